"""The demo scenario's rock table: invented two-phase curves for the four facies of the
"Saltmarrow Bank" sector (:mod:`upscale.gallery.demo_field`)."""

from __future__ import annotations

DEMO_ROCKS = """\
# Rock table of the synthetic "Saltmarrow Bank" sector: invented values, no real field.
[fluids]
water_viscosity = 0.45       # cP
oil_viscosity = 1.8          # cP
interfacial_tension = 0.028  # N/m, times cos(contact angle)

[rock.tidal_flat_heterolithic]
swc = 0.24
sor = 0.24
krw_max = 0.25
kro_max = 0.75
nw = 3.0
no = 2.5
j_entry = 0.30
pore_size_index = 1.5

[rock.channel_sand]
swc = 0.12
sor = 0.18
krw_max = 0.40
kro_max = 0.90
nw = 2.5
no = 2.0
j_entry = 0.20
pore_size_index = 2.5

[rock.shale_drape]
swc = 0.45
sor = 0.25
krw_max = 0.10
kro_max = 0.50
nw = 4.0
no = 3.0
j_entry = 0.40
pore_size_index = 0.8

[rock.cemented_streak]
swc = 0.40
sor = 0.30
krw_max = 0.15
kro_max = 0.55
nw = 3.5
no = 3.0
j_entry = 0.35
pore_size_index = 1.0
"""
