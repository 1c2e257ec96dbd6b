"""Figures (chitally.plot, Curve.plot) and `chitally plot`.

Every figure kind is rendered to PNG and read back with matplotlib.image.imread: it must
have the stated size in pixels and not be blank (its pixels vary). SVG and PDF are
recognised by their own headers (the SVG and PDF specifications' magic bytes).
"""

from __future__ import annotations

import numpy as np
import pytest
from click.testing import CliRunner

pytest.importorskip("matplotlib")
from matplotlib.image import imread

from chitally import euler_curve
from chitally.bands import bands
from chitally.cli import main
from chitally.features import feature_matrix
from chitally.jobs.bands import BandsParams, create_or_open
from chitally.plot import DPI, SIZE, figure, plot_bands, plot_curves, plot_matrix, save
from chitally.runs import Where, run

HEIGHT, WIDTH = int(SIZE[1] * DPI), int(SIZE[0] * DPI)


def assert_drawn(path) -> np.ndarray:
    image = imread(path)
    assert image.shape[:2] == (HEIGHT, WIDTH)
    assert image[..., :3].std() > 0.05  # a blank canvas has no spread at all
    return image


@pytest.fixture(scope="module")
def curves():
    rng = np.random.default_rng(0)
    return [euler_curve(rng.random((300, 2)), 0.15), euler_curve(rng.random((300, 2)) * [1, 0.3], 0.15)]


def test_curves_overlaid_with_a_legend(tmp_path, curves):
    ax = plot_curves(curves, ["box", "strip"], symlog=True, title="two curves")
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["box", "strip"]
    assert ax.get_yscale() == "symlog"
    # each curve drawn as its exact steps: one vertex per change point plus the end
    xs = ax.get_lines()[0].get_xdata()
    assert xs[0] == 0.0 and xs[-1] == 0.15
    assert_drawn(save(ax, tmp_path / "curves.png"))


def test_curve_plot_draws_on_the_axes_given(tmp_path, curves):
    fig, ax = figure()
    assert curves[0].plot(ax, label="one") is ax
    assert curves[1].plot(ax, label="two", color="k") is ax
    assert len(ax.get_lines()) == 2
    assert_drawn(save(fig, tmp_path / "one.png"))
    assert save(fig, tmp_path / "one.svg").read_bytes().lstrip()[:5] in (b"<?xml", b"<svg ")
    assert save(fig, tmp_path / "one.pdf").read_bytes()[:5] == b"%PDF-"
    with pytest.raises(ValueError, match="figure format"):
        save(fig, tmp_path / "one.jpg")


def test_bands_shaded(tmp_path):
    b = bands(np.random.default_rng(1).random((3000, 2)), 0.1, 20, 150, grid="0:0.1:21", draws=200)
    ax = plot_bands(b, label="box", kinds=("simultaneous", "normal", "percentile"))
    assert len(ax.collections) == 2  # two shaded bands; the percentile band as lines
    assert len(ax.get_lines()) == 3
    assert_drawn(save(ax, tmp_path / "bands.png"))


def test_feature_matrix_heatmap_groups_rows_by_label(tmp_path):
    rng = np.random.default_rng(2)
    clouds = [rng.random((40, 2)) for _ in range(5)]
    fm = feature_matrix(clouds, 0.3, "0:0.3:7", labels=["b", "a", "b", "c", "a"])
    ax = plot_matrix(fm, symlog=True, title="matrix")
    shown = ax.get_images()[0].get_array()
    # groups in order of first appearance: b (rows 0, 2), a (1, 4), c (3)
    assert np.array_equal(np.asarray(shown), fm.values[[0, 2, 1, 4, 3]])
    assert [t.get_text() for t in ax.get_yticklabels()] == ["b (2)", "a (2)", "c (1)"]
    assert_drawn(save(ax, tmp_path / "matrix.png"))


def test_cli_plot_each_kind(tmp_path, curves):
    curves[0].save(tmp_path / "box.csv")
    curves[1].save(tmp_path / "strip.json")
    pts = np.random.default_rng(3).random((1000, 2))
    store = create_or_open(str(tmp_path / "bands.zarr"), pts,
                           BandsParams.checked(0.1, 8, 100, "0:0.1:11", draws=100))
    assert run(store, Where(serial=True)).complete
    feature_matrix([pts[:50], pts[50:100], pts[100:150]], 0.2, "0:0.2:5", labels=["x", "y", "x"],
                   store=str(tmp_path / "fm.zarr"), where=Where(serial=True))
    runner = CliRunner()
    for args in (["box.csv", "strip.json", "--symlog"], ["bands.zarr"], ["fm.zarr", "--title", "m"]):
        out = tmp_path / f"{args[0].split('.')[0]}.png"
        res = runner.invoke(main, ["plot", *(str(tmp_path / a) if "." in a else a for a in args),
                                   "--out", str(out)])
        assert res.exit_code == 0, res.output
        assert_drawn(out)
    for args, message in ((["box.csv", "bands.zarr"], "plot draws curves together"),
                          (["box.csv"], "figure format comes from the ending")):
        out = tmp_path / ("x.png" if len(args) == 2 else "x.gif")
        res = runner.invoke(main, ["plot", *(str(tmp_path / a) for a in args), "--out", str(out)])
        assert res.exit_code == 2 and message in res.output and res.output.count("\n") == 1, res.output
        assert not out.exists()


def test_demo_two_catalogues_small(tmp_path):
    """The demo end to end at CI size: the filament catalogue differs from the uniform one
    (the test rejects, the bands separate) and the figure is drawn."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "demo"))
    from two_catalogues import main as demo

    out = demo(["--small", "--workdir", str(tmp_path)])
    assert out["p_value"] <= 0.01 and out["apart"] > 0 and out["l1"] > 0
    image = imread(out["figure"])
    assert image.shape[:2] == (480, 1500) and image[..., :3].std() > 0.05
