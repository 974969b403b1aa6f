"""`tinyloc bench map` on a small site: the figures it prints add up and the map it measures reads back.

No timing is asserted (speed goals live in the benchmark, not in tests).
"""

from types import SimpleNamespace

from tinyloc.bench import map as bench_map


def test_bench_map_figures_add_up():
    args = SimpleNamespace(size_m=200.0, res=0.5, window_m=32.0, reads=3, seed=3, tile=None, levels=None)
    d = bench_map.run(args)
    assert d["packed_bytes"] == d["header_bytes"] + d["index_bytes"] + d["model_bytes"] + d["tile_bytes"]
    assert d["model_bytes"] > 4            # 16 levels: context-coded tiles need the map's model
    assert d["packed_vs_gzip"] == round(d["packed_bytes"] / d["geojson_gzip9_bytes"], 3)
    assert d["window_cells"] == 64 and d["features"] > 100
