"""Tests of upscale.summary on small hand-built fields."""

import json

import numpy as np
import pytest
import xarray as xr

from upscale.checks.summary import field_summary
from upscale.errors import InputError
from upscale.io.pinch_outs import with_pinch_outs
from upscale.io.schema import fine_dataset
from upscale.io.validation import validate
from upscale.report.text import format_summary

NX, NY, NZ = 4, 3, 5


def inputs(seed=3):
    rng = np.random.default_rng(seed)
    shape = (NX, NY, NZ)
    dx = np.array([10.0, 20.0, 15.0, 5.0])
    dy = np.array([8.0, 12.0, 30.0])
    dz = rng.uniform(0.5, 3.0, shape)
    dz[0, 0, 1] = 0.0  # pinched cells
    dz[2, 1, 3] = 0.0
    dz[3, 2, 0] = 0.0
    active = np.ones(shape, dtype=np.int8)
    active[1, 1, 1] = 0  # flagged inactive, not pinched
    active[0, 2, 4] = 0
    active[0, 0, 1] = 0  # pinched and flagged
    kx = np.exp(rng.normal(4.0, 1.0, shape))
    return dict(kx=kx, ky=0.8 * kx, kz=np.exp(rng.normal(1.0, 1.5, shape)),
                porosity=rng.uniform(0.05, 0.3, shape), ntg=rng.uniform(0.4, 1.0, shape),
                dx=dx, dy=dy, dz=dz, active=active)


def field(**overrides):
    values = {**inputs(), **overrides}
    return validate(fine_dataset(**values)), values


def test_counts_and_sizes():
    ds, v = field()
    s = field_summary(ds)
    assert s["shape"] == [NX, NY, NZ]
    assert s["cells"] == NX * NY * NZ
    assert s["pinched_cells"] == 3
    # By hand: (0, 0, 1) and (2, 1, 3) have active cells above and below; (3, 2, 0) is on top.
    assert s["pinched_between_active"] == 2
    # each of those two is a run of its own between the active cells just above and below
    assert s["pinch_outs"] == {"connections": "yes", "thickness": 0.0, "units": "m", "runs_between_active": 2,
                               "cells_in_those_runs": 2, "connections_made": 2}
    expected_active = NX * NY * NZ - 3 - 2  # 3 pinched (one also flagged) + 2 flagged only
    assert s["active_cells"] == expected_active
    sizes = s["sizes"]
    assert sizes["dx"] == {"min": 5.0, "max": 20.0}
    assert sizes["dy"] == {"min": 8.0, "max": 30.0}
    assert sizes["dz"]["min"] == 0.0
    assert sizes["dz"]["max"] == pytest.approx(v["dz"].max())
    assert sizes["dz_min_positive"] == pytest.approx(v["dz"][v["dz"] > 0].min())
    assert sizes["length_x"] == pytest.approx(50.0)
    assert sizes["length_y"] == pytest.approx(50.0)
    column = v["dz"].sum(axis=2)
    assert sizes["thickness"]["min"] == pytest.approx(column.min())
    assert sizes["thickness"]["max"] == pytest.approx(column.max())


def test_volumes_computed_independently():
    ds, v = field()
    s = field_summary(ds)
    pore = bulk = active_bulk = 0.0
    for i in range(NX):
        for j in range(NY):
            for k in range(NZ):
                cell = v["dx"][i] * v["dy"][j] * v["dz"][i, j, k]
                bulk += cell
                if v["active"][i, j, k] and v["dz"][i, j, k] > 0:
                    active_bulk += cell
                    pore += v["porosity"][i, j, k] * v["ntg"][i, j, k] * cell
    assert s["volumes"]["pore"] == pytest.approx(pore, rel=1e-12)
    assert s["volumes"]["bulk"] == pytest.approx(bulk, rel=1e-12)
    assert s["volumes"]["active_bulk"] == pytest.approx(active_bulk, rel=1e-12)


def test_cell_statistics_match_numpy():
    ds, v = field()
    s = field_summary(ds)
    mask = (v["active"] == 1) & (v["dz"] > 0)
    for name in ("kx", "ky", "kz", "porosity", "ntg"):
        values = v[name][mask]
        entry = s["values"][name]
        # order statistics exactly (numpy's own arithmetic), the mean to round-off
        p10, p50, p90 = np.percentile(values, [10, 50, 90])
        assert (entry["p10"], entry["p50"], entry["p90"]) == (p10, p50, p90), name
        assert (entry["min"], entry["max"]) == (values.min(), values.max()), name
        assert entry["mean"] == pytest.approx(values.mean(), rel=1e-12), name
    assert s["values"]["kx"]["units"] == "mD"


def _weighted_cv(k, weight):
    """Coefficient of variation with frequency weights: std / mean by numpy's weighted averages."""
    mean = np.average(k, weights=weight)
    return float(np.sqrt(np.average((k - mean) ** 2, weights=weight)) / mean)


def _weighted_percentile(values, weight, q):
    """Hazen plotting positions (i - 1/2) / n of a probability plot (Jensen, Lake, Corbett
    & Goggin 2000, Statistics for Petroleum Engineers and Geoscientists, from memory),
    with weights as frequencies: the sorted value i sits at (C_i - w_i / 2) / W; linear
    in between. Written here for distinct values (continuous random samples)."""
    order = np.argsort(values)
    values, weight = np.asarray(values)[order], np.asarray(weight)[order]
    position = (np.cumsum(weight) - weight / 2) / weight.sum()
    return float(np.interp(q / 100, position, values))


def _dykstra_parsons(k, weight):
    """V = (k50 - k84.1) / k50, k84.1 exceeded by 84.1 % of the rock (the 15.9th
    percentile) (Dykstra & Parsons 1950; Jensen et al. 2000)."""
    k50 = _weighted_percentile(k, weight, 50.0)
    return (k50 - _weighted_percentile(k, weight, 15.9)) / k50


def _lorenz(flow_capacity, storage_capacity):
    """Schmalz & Rahme (1950): cells sorted by flow over storage capacity, largest first;
    the cumulative fractions of flow against storage capacity, from the origin; 2 (area - 1/2)."""
    order = np.argsort(-flow_capacity / storage_capacity)
    flow = np.concatenate([[0.0], np.cumsum(flow_capacity[order]) / flow_capacity.sum()])
    storage = np.concatenate([[0.0], np.cumsum(storage_capacity[order]) / storage_capacity.sum()])
    return float(2 * (np.trapezoid(flow, storage) - 0.5))


def _flow_permeability(v, mask):
    return {"x": (v["kx"] * v["ntg"])[mask], "y": (v["ky"] * v["ntg"])[mask], "z": v["kz"][mask]}


def test_heterogeneity_uses_flow_permeability_and_bulk_weights():
    # CV and Dykstra-Parsons of the flow permeability (kx*ntg, ky*ntg, kz) over active cells,
    # each cell weighted by its bulk volume (dx and dy vary here, so that weighting by
    # thickness alone would differ), computed here by numpy (rounding only: 1e-12).
    ds, v = field()
    s = field_summary(ds)
    mask = (v["active"] == 1) & (v["dz"] > 0)
    bulk = (v["dx"][:, None, None] * v["dy"][None, :, None] * v["dz"])[mask]
    for axis, k in _flow_permeability(v, mask).items():
        entry = s["heterogeneity"][axis]
        assert entry["coefficient_of_variation"] == pytest.approx(_weighted_cv(k, bulk), rel=1e-12), axis
        assert entry["dykstra_parsons"] == pytest.approx(_dykstra_parsons(k, bulk), rel=1e-12), axis
        assert entry["coefficient_of_variation"] != pytest.approx(_weighted_cv(k, v["dz"][mask]), rel=1e-3)
        assert 0 < entry["lorenz"] < 1
    # ky = 0.8 kx everywhere: the dimensionless measures must agree between x and y.
    for key in ("coefficient_of_variation", "dykstra_parsons", "lorenz"):
        assert s["heterogeneity"]["x"][key] == pytest.approx(s["heterogeneity"]["y"][key], rel=1e-9)


def test_lorenz_weights_cells_by_bulk_volume():
    # Schmalz & Rahme (1950) plot flow capacity k h against storage capacity porosity h for
    # layers of equal areal extent; for cells of different areas the same quantities per
    # cell are k V and porosity ntg V (a cell of twice the volume is two cells). Computed
    # here with numpy (rounding only: 1e-12).
    ds, v = field()
    s = field_summary(ds)
    mask = (v["active"] == 1) & (v["dz"] > 0)
    bulk = (v["dx"][:, None, None] * v["dy"][None, :, None] * v["dz"])[mask]
    storage = (v["porosity"] * v["ntg"])[mask] * bulk
    for axis, k in _flow_permeability(v, mask).items():
        assert s["heterogeneity"][axis]["lorenz"] == pytest.approx(_lorenz(k * bulk, storage), rel=1e-12), axis


def _split_second_column():
    """The inputs with column x = 1 (dx = 20 m) cut into two identical columns of 10 m."""
    values = inputs()
    twice = {name: np.concatenate([a[:2], a[1:]], axis=0) if np.ndim(a) == 3 else a for name, a in values.items()}
    twice["dx"] = np.array([10.0, 10.0, 10.0, 15.0, 5.0])
    return twice


@pytest.mark.parametrize("measure", ["coefficient_of_variation", "dykstra_parsons",
                                     "lorenz"])
def test_splitting_a_column_leaves_the_heterogeneity_unchanged(measure):
    # A column 20 m wide and two identical columns 10 m wide are the same rock: every
    # measure must be the same (weights act as frequencies); rounding only, 1e-12.
    before = field_summary(field()[0])["heterogeneity"]
    after = field_summary(validate(fine_dataset(**_split_second_column())))["heterogeneity"]
    for axis in "xyz":
        assert after[axis][measure] == pytest.approx(before[axis][measure], rel=1e-12), axis


def test_homogeneous_net_field_has_no_horizontal_heterogeneity():
    # Uniform net properties while net-to-gross varies. Horizontally kx*ntg and the storage
    # porosity*ntg scale alike, so k / porosity is uniform: Lorenz 0 in x and y. Vertically
    # kz is the cell's own value (not scaled by ntg), so kz / (porosity*ntg) varies: Lorenz > 0.
    shape = (NX, NY, NZ)
    ntg = np.random.default_rng(1).uniform(0.3, 1.0, shape)
    ds, _ = field(kx=np.full(shape, 100.0), ky=np.full(shape, 100.0), kz=np.full(shape, 10.0),
                  porosity=np.full(shape, 0.2), ntg=ntg)
    h = field_summary(ds)["heterogeneity"]
    assert h["x"]["lorenz"] == pytest.approx(0.0, abs=1e-12)
    assert h["y"]["lorenz"] == pytest.approx(0.0, abs=1e-12)
    assert h["z"]["lorenz"] > 0.05
    assert h["z"]["coefficient_of_variation"] == 0.0
    assert h["z"]["dykstra_parsons"] == 0.0
    assert h["x"]["coefficient_of_variation"] > 0.05  # kx*ntg does vary
    assert h["x"]["dykstra_parsons"] > 0.05


def test_layered_column_lorenz_by_hand():
    # One column of two equal layers, k 300 and 100, equal porosity: Lorenz 0.25 (see
    # test_heterogeneity.test_lorenz_by_hand); DP with 2 equal weights: k50 = 200,
    # k15.9 = 100, V = 0.5.
    k = np.array([300.0, 100.0]).reshape(1, 1, 2)
    ds = validate(fine_dataset(kx=k, ky=k, kz=k, porosity=np.full(k.shape, 0.2),
                               dx=[50.0], dy=[50.0], dz=[2.0, 2.0]))
    s = field_summary(ds)
    assert s["heterogeneity"]["x"]["lorenz"] == pytest.approx(0.25, rel=1e-12)
    assert s["heterogeneity"]["x"]["dykstra_parsons"] == pytest.approx(0.5, rel=1e-12)
    assert s["heterogeneity"]["x"]["coefficient_of_variation"] == pytest.approx(0.5, rel=1e-12)


def test_transmissibility_statistics_when_present():
    ds, _ = field()
    assert field_summary(ds)["transmissibility"] == {}
    tx = np.random.default_rng(5).uniform(1.0, 9.0, (NX + 1, NY, NZ))
    tx[0] = np.nan  # boundary faces without a value
    mult = np.full((NX + 1, NY, NZ), 0.5)
    tz = np.arange(NX * NY * (NZ + 1), dtype=float).reshape(NX, NY, NZ + 1)
    raw = fine_dataset(**inputs())
    raw["tx"] = xr.Variable(("x_face", "y", "z"), tx, {"units": "m3"})
    raw["tx_multiplier"] = xr.Variable(("x_face", "y", "z"), mult)
    raw["tz"] = xr.Variable(("x", "y", "z_face"), tz)
    raw["unrelated"] = xr.Variable(("x_face", "y", "z"), mult)
    s = field_summary(validate(raw))
    t = s["transmissibility"]
    assert list(t) == ["tx", "tx_multiplier", "tz"]
    finite = tx[np.isfinite(tx)]
    assert t["tx"]["count"] == finite.size
    assert t["tx"]["min"] == pytest.approx(finite.min())
    assert t["tx"]["max"] == pytest.approx(finite.max())
    assert t["tx"]["mean"] == pytest.approx(finite.mean())
    assert t["tx_multiplier"]["mean"] == 0.5
    assert t["tz"]["max"] == tz.max() and t["tz"]["min"] == 0.0
    text = format_summary(s)
    assert "tx_multiplier" in text and "tz" in text and "unrelated" not in text


def test_summary_is_plain_json():
    ds, _ = field()
    s = field_summary(ds)

    def walk(value):
        if isinstance(value, dict):
            assert all(isinstance(key, str) for key in value)
            for item in value.values():
                walk(item)
        elif isinstance(value, list):
            for item in value:
                walk(item)
        else:
            assert type(value) in (int, float, str), (value, type(value))

    walk(s)
    assert json.loads(json.dumps(s))["active_cells"] == s["active_cells"]


def test_format_summary():
    ds, _ = field()
    s = field_summary(ds)
    text = format_summary(s)
    assert isinstance(text, str)
    for word in ("kx", "ky", "kz", "porosity", "ntg", "min", "p10", "p50", "p90", "max", "mean",
                 "CV", "Dykstra-Parsons", "Lorenz", "pinched"):
        assert word in text, word
    assert f"{NX} x {NY} x {NZ}" in text
    assert f"{s['active_cells']} active" in text
    assert "2 of them between active cells of their column: 2 pinch-out connection(s) made" in text
    clear = format_summary({**s, "pinch_outs": {**s["pinch_outs"], "runs_between_active": 0}})
    assert "pinched (dz = 0)" in clear and "between active cells" not in clear
    sealed = format_summary({**s, "pinch_outs": {**s["pinch_outs"], "connections": "no", "connections_made": 0}})
    assert "2 of them between active cells of their column: no flow crosses them" in sealed
    assert f"{s['volumes']['pore']:.4g}" in text
    # One row per variable, with its six statistics in order.
    row = next(line for line in text.splitlines() if line.startswith("porosity"))
    numbers = [float(x) for x in row.split()[2:]]
    expected = [s["values"]["porosity"][k] for k in ("min", "p10", "p50", "p90", "max", "mean")]
    assert numbers == pytest.approx(expected, rel=1e-3)
    rows = {line.split()[0]: line for line in text.splitlines() if line.split()}
    for axis in "xyz":
        values = [float(x) for x in rows[axis].split()[2:]]
        h = s["heterogeneity"][axis]
        assert values == pytest.approx([h["coefficient_of_variation"], h["dykstra_parsons"], h["lorenz"]],
                                       rel=1e-3)


def test_pinch_out_connections_counted_by_hand():
    # One column of ten layers, active (A), pinched (P) or inactive (I), dz in m:
    # A1 P P A2 I1.5 P A0.4 P A3 P. Runs with an active cell just above and below: layers
    # 1-2 and layer 7 (3 cells); layer 5 lies below an inactive cell, layer 9 reaches the
    # bottom. With a threshold of 0.5 m layer 6 counts as pinched: the run 5-7 lies below
    # the inactive cell, only layers 1-2 remain.
    dz = np.array([1.0, 0.0, 0.0, 2.0, 1.5, 0.0, 0.4, 0.0, 3.0, 0.0]).reshape(1, 1, 10)
    active = np.ones(dz.shape, dtype=np.int8)
    active[0, 0, 4] = 0
    k = np.full(dz.shape, 10.0)
    ds = validate(fine_dataset(k, k, k, np.full(dz.shape, 0.2), np.ones(1), np.ones(1), dz, active=active))
    pinch = field_summary(ds)["pinch_outs"]
    assert (pinch["runs_between_active"], pinch["cells_in_those_runs"], pinch["connections_made"]) == (2, 3, 2)
    thin = field_summary(with_pinch_outs(ds, thickness=0.5))["pinch_outs"]
    assert (thin["runs_between_active"], thin["cells_in_those_runs"], thin["thickness"]) == (1, 2, 0.5)
    off = field_summary(with_pinch_outs(ds, connections=False))["pinch_outs"]
    assert (off["runs_between_active"], off["connections_made"], off["connections"]) == (2, 0, "no")


def test_unnormalised_field_is_refused():
    raw = fine_dataset(**{k: v for k, v in inputs().items() if k not in ("ntg", "active")})
    with pytest.raises(InputError, match="validate"):
        field_summary(raw)


def _flat(summary, prefix=""):
    out = {}
    for key, value in summary.items():
        out.update(_flat(value, f"{prefix}{key}.") if isinstance(value, dict) else {prefix + key: value})
    return out


#: what does not depend on the slabs at all: counts, extremes, order statistics
EXACT = ("shape", "cells", "active_cells", "pinched", ".min", ".max", ".p10", ".p50", ".p90", "dims", "units",
         "count", "permeability", "length_")


def _assert_same_summary(got, expected, label):
    got, expected = _flat(got), _flat(expected)
    assert sorted(got) == sorted(expected)
    for key, value in expected.items():
        if any(part in key for part in EXACT) or not isinstance(value, float):
            assert got[key] == value, (label, key)
        else:   # sums in another order: round-off (1e-12)
            assert got[key] == pytest.approx(value, rel=1e-12, nan_ok=True), (label, key)


def _bigger_field():
    """30 x 8 x 12 cells with pinched and inactive cells and many equal values (ntg 1 in most cells)."""
    rng = np.random.default_rng(9)
    shape = (30, 8, 12)
    dz = rng.uniform(0.5, 3.0, shape)
    dz[rng.random(shape) < 0.05] = 0.0
    active = (rng.random(shape) > 0.05).astype(np.int8)
    kx = np.exp(rng.normal(3.0, 2.0, shape))
    ntg = np.where(rng.random(shape) < 0.6, 1.0, rng.uniform(0.2, 1.0, shape))
    return validate(fine_dataset(kx, 0.5 * kx, np.exp(rng.normal(0.0, 1.0, shape)), rng.uniform(0.05, 0.3, shape),
                                 rng.uniform(5, 30, shape[0]), rng.uniform(5, 30, shape[1]), dz, ntg=ntg, active=active))


@pytest.mark.parametrize("limit", [None, 4])
def test_a_summary_in_slabs_equals_the_one_in_memory(monkeypatch, limit):
    # Slabs of 1, 4, 7 and 29 x planes (the last slabs shorter): counts (pinch-out
    # connections too: slabs hold whole columns), extremes and the percentiles exactly the
    # same, sums and the measures built on them to round-off; a collection limit of 4
    # samples makes the percentile searches narrow their bins over several passes instead
    # of collecting them in the second.
    import upscale.core.order_statistics as order_statistics

    if limit is not None:
        monkeypatch.setattr(order_statistics, "COLLECT_LIMIT", limit)
    ds = _bigger_field()
    passes = []
    whole = field_summary(ds, passes=passes)
    assert passes[1] == 1 and passes[0] >= (3 if limit else 2)
    # the pinch-out connections, counted per slab, are among the exact counts compared
    assert whole["pinch_outs"]["connections_made"] > 0
    for slab in (1, 4, 7, 29):
        counted = []
        _assert_same_summary(field_summary(ds, slab=slab, passes=counted), whole, slab)
        assert counted == [passes[0], -(-30 // slab)]
    # a lazy field, read chunk by chunk, is a field in slabs too
    _assert_same_summary(field_summary(ds.chunk({"x": 6})), whole, "lazy")


def test_inspect_within_a_small_memory_budget_reads_many_slabs(tmp_path, cli_command, cli_env):
    # 40 x 100 x 20 cells: 2,000 cells per x plane; 440 MB leave about 12 MB after the
    # process (300 MB), the statistics and the read cache (128 MB): a few x planes per slab. The JSON must be
    # the in-memory one (same rules as above).
    import subprocess

    from upscale.checks.summary import summary_slab

    rng = np.random.default_rng(4)
    shape = (40, 100, 20)
    kx = np.exp(rng.normal(3.0, 1.5, shape))
    ds = fine_dataset(kx, kx, 0.1 * kx, rng.uniform(0.1, 0.3, shape), np.full(40, 20.0), np.full(100, 10.0),
                      rng.uniform(0.5, 2.0, shape), ntg=np.where(rng.random(shape) < 0.5, 1.0, 0.7))
    ds.to_netcdf(tmp_path / "field.nc")
    planes = summary_slab(shape, 440 * 2 ** 20, 300 * 2 ** 20)
    assert 1 < planes < 40
    done = subprocess.run([*cli_command, "inspect", "field.nc", "--json", "--memory", "440MB"], cwd=tmp_path,
                          env=cli_env, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert f"over {-(-40 // planes)} slab(s) of at most {planes} x planes" in done.stderr
    _assert_same_summary(json.loads(done.stdout), field_summary(validate(ds)), "cli")


def test_inspect_refuses_a_field_whose_one_slab_does_not_fit(tmp_path, cli_command, cli_env):
    # One x plane of 300 x 200 cells needs about 15 MB, more than a 440 MB budget leaves:
    # refused before any work, in one line, exit code 2, nothing printed on stdout.
    import subprocess

    shape = (2, 300, 200)
    k = np.full(shape, 10.0)
    fine_dataset(k, k, k, np.full(shape, 0.2), [10.0, 10.0], np.full(300, 10.0), np.full(200, 1.0)).to_netcdf(
        tmp_path / "wide.nc")
    done = subprocess.run([*cli_command, "inspect", "wide.nc", "--memory", "440MB"], cwd=tmp_path, env=cli_env,
                          capture_output=True, text=True)
    assert done.returncode == 2 and done.stdout == ""
    assert len(done.stderr.strip().splitlines()) == 1
    assert "one x plane, 300 x 200 cells" in done.stderr and "give --memory" in done.stderr
