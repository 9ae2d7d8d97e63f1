"""The shipped demo images are exactly what the generator writes."""

import json

import numpy as np

from imgreduce.demo import BATCH_DEFECTS, demo_images_path, generate_demo_images, run_demo
from imgreduce.ingest import read_images


def test_committed_demo_images_match_the_generator(tmp_path):
    shipped = demo_images_path()
    fresh = generate_demo_images(tmp_path / "demo")
    assert json.loads((fresh / "labels.json").read_text()) == \
        json.loads((shipped / "labels.json").read_text())
    for sub in ("reference", "batch"):
        a = read_images(fresh / sub)
        b = read_images(shipped / sub)
        assert [p.split("/")[-1] for p in a.paths] == [p.split("/")[-1] for p in b.paths]
        np.testing.assert_array_equal(a.pixels, b.pixels)


def test_labels_cover_every_batch_frame_and_boxes_fit():
    folder = demo_images_path()
    labels = json.loads((folder / "labels.json").read_text())
    files = sorted(p.name for p in (folder / "batch").iterdir())
    assert sorted(f["file"].split("/")[-1] for f in labels["batch"]) == files
    kinds = [f["kind"] for f in labels["batch"]]
    assert sum(k != "good" for k in kinds) == len(BATCH_DEFECTS)
    w, h = labels["size"]
    for frame in labels["batch"]:
        if frame["box"] is not None:
            r0, c0, r1, c1 = frame["box"]
            assert 0 <= r0 < r1 <= h and 0 <= c0 < c1 <= w


def test_generation_is_deterministic(tmp_path):
    a = generate_demo_images(tmp_path / "a", n_reference=2, n_batch=6)
    b = generate_demo_images(tmp_path / "b", n_reference=2, n_batch=6)
    for name in ("reference/part_0001.png", "batch/part_0005.png"):
        assert (a / name).read_bytes() == (b / name).read_bytes()


def test_run_demo_writes_basis_and_figures(tmp_path):
    lines = []
    result = run_demo(tmp_path / "out", say=lines.append)
    names = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert names == ["basis.npz", "components.png", "mean.png", "quality_curves.png",
                     "rebuild_part_0005.png", "rebuild_part_0012.png",
                     "rebuild_part_0024.png", "screen", "spectrum.png"]
    assert result["images"] == 120 and 1 <= result["rank"] <= 60
    # Measured: all 9 defective frames flagged and none of the 51 good ones (aligned,
    # alpha 0.01).
    screen = result["screen"]
    assert screen["defective_caught"] == screen["defective"] == 9
    assert screen["false_alarms"] <= 2
    shots = sorted(p.name for p in (tmp_path / "out" / "screen").iterdir())
    assert "control_chart.png" in shots and "screen.csv" in shots
    assert len([n for n in shots if n.startswith("flagged_")]) == screen["flagged"]
    assert any("wrote" in line for line in lines)
