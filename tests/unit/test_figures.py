"""The pictures of the design and the contrasts stay readable from 1 to 40 columns and 10 to 1,000 rows.

References: WCAG 2.1 contrast ratio (at least 4.5:1 for text, success criterion 1.4.3) for numbers written in
cells; the figure's own bounding boxes (matplotlib) for text cut off or laid over the matrix.
"""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pytest
from matplotlib.text import Text

from groupmodel.outputs.figures import (
    PALETTE,
    _number_colours,
    contrasts_figure,
    design_figure,
    plot_contrasts,
    plot_design,
    relative_luminance,
)

LONG = "group=level{}:site=s{}"


def _names(p: int) -> list[str]:
    return ["intercept", *[LONG.format(j, j % 3) for j in range(max(p - 2, 0))], *(["age"] if p > 1 else [])][:p]


def _texts(fig: plt.Figure) -> list[Text]:
    return [t for t in fig.findobj(Text) if t.get_visible() and t.get_text().strip()]


def _check_layout(fig: plt.Figure) -> None:
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    box = fig.bbox
    ax = fig.axes[0]
    matrix = ax.get_window_extent(renderer)
    caption = ax.xaxis.label.get_window_extent(renderer)
    footer = fig._supxlabel.get_window_extent(renderer)
    for text in _texts(fig):
        ext = text.get_window_extent(renderer)
        assert ext.x0 >= box.x0 - 1 and ext.x1 <= box.x1 + 1, f"cut off left/right: {text.get_text()[:40]!r}"
        assert ext.y0 >= box.y0 - 1 and ext.y1 <= box.y1 + 1, f"cut off top/bottom: {text.get_text()[:40]!r}"
        assert text.get_fontsize() >= 5
    assert caption.y1 <= matrix.y0, "the caption overlaps the matrix"
    assert footer.y1 <= caption.y0 + 1, "the footer overlaps the caption"
    for label in ax.get_xticklabels():  # column names above the matrix
        assert label.get_window_extent(renderer).y0 >= matrix.y1 - 1
    ys = sorted(t.get_window_extent(renderer).y0 for t in ax.get_yticklabels() if t.get_text())
    heights = [t.get_window_extent(renderer).height for t in ax.get_yticklabels() if t.get_text()]
    if len(ys) > 1:
        assert min(np.diff(ys)) >= 0.9 * max(heights), "row labels overlap"
    plt.close(fig)


@pytest.mark.parametrize("p", [1, 2, 5, 40])
@pytest.mark.parametrize("n", [10, 1000])
def test_design_picture_text_fits_and_does_not_overlap(p: int, n: int) -> None:
    rng = np.random.default_rng(p + n)
    matrix = np.column_stack([np.ones(n), rng.normal(size=(n, p - 1))])
    _check_layout(design_figure(matrix, _names(p), [f"sub-{i:04d}" for i in range(n)]))


@pytest.mark.parametrize("p", [1, 2, 5, 40])
@pytest.mark.parametrize("q", [0, 1, 12])
def test_contrasts_picture_text_fits_and_does_not_overlap(p: int, q: int) -> None:
    rng = np.random.default_rng(p + q)
    rows = rng.choice([0.0, 1.0, -1.0, 0.5, 1 / 3], (q, p))
    labels = [f"hypothesis_{i}_with_a_long_name" if i % 2 else f"h{i}" for i in range(q)]
    _check_layout(contrasts_figure(rows, labels, _names(p), ["t"] * q))


def test_numbers_in_cells_contrast_with_every_colour_of_the_palette() -> None:
    # Reference: WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05) >= 4.5 for text.
    scaled = np.linspace(-1, 1, 801)
    cell = relative_luminance(plt.get_cmap(PALETTE)((scaled + 1) / 2)[:, :3])
    colours = _number_colours(scaled)
    ratio = np.where(colours == "white", 1.05 / (cell + 0.05), (cell + 0.05) / 0.05)
    assert ratio.min() >= 4.5
    assert colours[0] == "white" and colours[-1] == "white" and colours[400] == "black"  # dark ends, light middle
    # the written numbers use them
    fig = contrasts_figure(np.array([[1.0, 0.0, -1.0, 0.1]]), ["h"], ["a", "b", "c", "d"], ["t"])
    written = {t.get_text(): t.get_color() for t in fig.axes[0].texts}
    assert written == {"1": "white", "-1": "white", "0.1": "black"}
    plt.close(fig)


def test_pictures_drawn_in_memory_equal_the_pictures_drawn_to_files(tmp_path) -> None:
    # The fit draws its pictures into memory in a thread and writes the bytes later; reference: the same
    # figures saved straight to files by matplotlib.
    from pathlib import Path

    from groupmodel.model.assembly import build
    from groupmodel.model.spec import load_spec
    from groupmodel.outputs.design_files import PictureJob
    from groupmodel.outputs.folder import OutputFolder
    from groupmodel.outputs.numbers import tidy

    example = Path(__file__).resolve().parents[2] / "example_study"
    model = build(load_spec(example / "model.json"))
    with OutputFolder(tmp_path / "out") as o:
        assert PictureJob(model).write(o) == ["design.png", "contrasts.png"]
    d = model.design
    plot_design(tmp_path / "design.png", tidy(d.matrix, axis=0), d.column_names, d.participant_ids)
    rows, labels, tests = model.contrast_rows()
    plot_contrasts(tmp_path / "contrasts.png", tidy(rows, axis=1), labels, d.column_names, tests)
    for name in ("design.png", "contrasts.png"):
        assert (tmp_path / "out" / name).read_bytes() == (tmp_path / name).read_bytes()


def test_a_failed_drawing_is_raised_when_written(monkeypatch: pytest.MonkeyPatch) -> None:
    from pathlib import Path

    import groupmodel.outputs.design_files as design_files
    from groupmodel.model.assembly import build
    from groupmodel.model.spec import load_spec

    def broken(model):
        raise RuntimeError("no pictures")

    monkeypatch.setattr(design_files, "picture_bytes", broken)
    model = build(load_spec(Path(__file__).resolve().parents[2] / "example_study" / "model.json"))
    with pytest.raises(RuntimeError, match="no pictures"):
        design_files.PictureJob(model).write(None)  # type: ignore[arg-type]
