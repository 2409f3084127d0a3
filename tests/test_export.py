"""Writers: VTU tags read back with meshio, atomic writes keep existing files."""

import meshio
import numpy as np
import pytest

from ibprep import Grid
from ibprep.io.export import write_tags_vtu, write_time_series
from ibprep.files import atomic_write


def test_tags_vtu_shares_corners_and_reads_back(tmp_path):
    g = Grid(lower=(0, 0, 0), upper=(1, 1, 1), spacing=0.25)
    tags = np.zeros(g.shape, np.uint8)
    tags[1:3, 1:3, 1:3] = 1  # a 2x2x2 solid block
    path = write_tags_vtu(tags, g, tmp_path / "t.vtu")
    m = meshio.read(path)
    hexes = m.cells[0].data
    assert hexes.shape == (8, 8)
    assert len(m.points) == 27  # 3 x 3 x 3 lattice nodes, each written once
    corners = m.points[hexes]
    np.testing.assert_allclose(corners.max(axis=1) - corners.min(axis=1), 0.25)  # every cell one spacing wide
    assert set(m.cell_data["tag"][0]) == {1}


def test_failed_write_leaves_the_existing_file(tmp_path):
    target = tmp_path / "keep.txt"
    target.write_text("old")

    def broken(tmp):
        open(tmp, "w").write("half")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError, match="disk full"):
        atomic_write(target, broken)
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["keep.txt"]  # no temporary left behind


def test_time_series_lists_every_step(tmp_path):
    p = write_time_series([(0.0, tmp_path / "a.vtu"), (0.5, tmp_path / "b.vtu")], tmp_path / "s.pvd")
    text = p.read_text()
    assert 'timestep="0.5"' in text and 'file="b.vtu"' in text


def test_written_files_get_the_usual_permissions(tmp_path):
    import os

    mask = os.umask(0o022)
    os.umask(mask)
    p = atomic_write(tmp_path / "new.txt", lambda tmp: open(tmp, "w").write("x"))
    assert p.stat().st_mode & 0o777 == 0o666 & ~mask  # as open() would make it, not mkstemp's 0600
    os.chmod(p, 0o640)
    atomic_write(p, lambda tmp: open(tmp, "w").write("y"))
    assert p.stat().st_mode & 0o777 == 0o640  # an existing file keeps its mode


@pytest.mark.parametrize("roll_deg, labels", [(0.0, 2), (30.0, 3)])
def test_motion_plot_shows_the_roll_stroke_when_there_is_one(tmp_path, monkeypatch, roll_deg, labels):
    import math

    import ibprep.io.export as ex
    from ibprep import Motion

    seen = {}
    real = ex._save_figure

    def spy(fig, path):
        seen["lines"] = {ln.get_label(): ln.get_ydata() for ln in fig.axes[1].get_lines()}
        return real(fig, path)

    monkeypatch.setattr(ex, "_save_figure", spy)
    mot = Motion(frequency=1.0, pitch_amplitude=math.radians(20), phase=math.pi / 2,
                 roll_amplitude=math.radians(roll_deg))
    path = ex.plot_motion(mot, 0.04, 0.08, tmp_path / "motion.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert len(seen["lines"]) == labels
    if roll_deg:
        assert np.max(seen["lines"]["roll φ"]) == pytest.approx(roll_deg, rel=1e-4)  # sampled peak of a sine
