"""blockyard.plotting: the token axis every figure labels the same way, and the PNG writer they share.

Reading tick labels after ``fig.canvas.draw()`` is how matplotlib's own tests read them (common
practice, no source); the PNG signature is from the PNG specification (ISO/IEC 15948:2004, 5.2).
"""

from __future__ import annotations

from blockyard.plotting import finish, label_token_axis, pyplot

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def test_token_axis_reads_in_one_unit_without_an_offset():
    plt = pyplot()
    for top, unit in ((1.4e6, "M"), (9e5, "k"), (3e9, "G")):
        fig, ax = plt.subplots()
        ax.plot([top / 7, top], [2.0, 1.0])
        label_token_axis(ax.xaxis)
        fig.canvas.draw()
        labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
        assert ax.xaxis.get_offset_text().get_text() == ""  # matplotlib's "1e6" is gone
        assert labels and all(lab == "0" or lab.endswith(unit) for lab in labels), labels
        plt.close(fig)
    fig, ax = plt.subplots()
    ax.set_xlim(0, 1.45e6)
    ax.set_xticks([0, 2e5, 1.4e6])
    label_token_axis(ax.xaxis)
    fig.canvas.draw()
    assert [t.get_text() for t in ax.get_xticklabels()] == ["0", "0.2M", "1.4M"]
    plt.close(fig)


def test_finish_writes_a_png_into_new_folders_and_closes_the_figure(tmp_path):
    plt = pyplot()
    fig, ax = plt.subplots()
    ax.plot([0, 1], [1, 0])
    out = finish(fig, tmp_path / "a" / "b" / "plot.png")
    assert out == tmp_path / "a" / "b" / "plot.png"
    assert out.read_bytes().startswith(PNG_SIGNATURE)
    assert not plt.fignum_exists(fig.number)
    assert [p.name for p in out.parent.iterdir()] == ["plot.png"]  # no temp file left beside it
