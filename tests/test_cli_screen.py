"""screen through the command line: modes, outputs, streaming, refusals."""

import csv
import json
import shutil

import numpy as np
import pytest
from PIL import Image

from imgreduce.cli import main
from imgreduce.demo import demo_images_path

DEMO = demo_images_path()


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _flags(doc):
    return {i["path"].split("/")[-1]: i["reasons"] for i in doc["images"] if i["flagged"]}


def test_reference_mode_outputs_and_json(tmp_path, capsys):
    out = tmp_path / "out"
    code, stdout, err = _run(capsys, "screen", DEMO / "batch", "--reference",
                             DEMO / "reference", "-o", out, "--json")
    assert code == 0, err
    doc = json.loads(stdout)
    for key in ("alpha", "rank", "q_limit", "t2_limit", "images", "mode", "caution"):
        assert key in doc
    assert doc["mode"] == "reference" and doc["alpha"] == 0.01 and len(doc["images"]) == 60
    image = doc["images"][17]  # part_0018: a missing hole
    assert set(image) >= {"path", "q", "t2", "flagged", "reasons", "peak", "box"}
    assert image["flagged"] and len(image["peak"]) == 2 and len(image["box"]) == 4
    assert all(i["peak"] is None and i["box"] is None for i in doc["images"] if not i["flagged"])
    with open(out / "screen.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0])[:7] == ["path", "q", "q_limit", "t2", "t2_limit", "local",
                                 "local_limit"]
    assert len(rows) == 60 and sum(r["flagged"] == "1" for r in rows) == doc["flagged"]
    assert (out / "control_chart.png").stat().st_size > 10_000
    assert len(list((out / "flagged").glob("*.png"))) == doc["flagged"]
    assert "aid to inspection" in (out / "summary.txt").read_text()
    assert "aid to inspection" in err


def test_saved_basis_streams_with_the_same_result(tmp_path, capsys):
    saved = tmp_path / "screen.npz"
    code, first, err = _run(capsys, "screen", DEMO / "batch", "--reference", DEMO / "reference",
                            "--save-basis", saved, "--json")
    assert code == 0, err
    code, again, err = _run(capsys, "screen", DEMO / "batch", "--basis", saved, "--chunk", "7",
                            "--json")
    assert code == 0, err
    first, again = json.loads(first), json.loads(again)
    assert again["mode"] == "basis"
    assert _flags(again) == _flags(first)
    assert again["q_limit"] == pytest.approx(first["q_limit"])
    # A stored calibration is not silently re-ranked.
    code, _, err = _run(capsys, "screen", DEMO / "batch", "--basis", saved, "--rank", "5")
    assert code == 1 and "calibrated at rank" in err


def test_fail_on_flag_exits_3(capsys):
    code, _, _ = _run(capsys, "screen", DEMO / "batch", "--reference", DEMO / "reference",
                      "--fail-on-flag", "-q")
    assert code == 3


def test_self_and_batch_modes(tmp_path, capsys):
    code, stdout, err = _run(capsys, "screen", DEMO / "batch", "--json")
    assert code == 0, err
    doc = json.loads(stdout)
    assert doc["mode"] == "self" and doc["flagged"] >= 4
    assert "part_0035.png" in _flags(doc)  # the part shifted on the belt
    basis = tmp_path / "plain.npz"
    assert _run(capsys, "fit", DEMO / "reference", "-o", basis, "--rank", "30", "-q")[0] == 0
    code, stdout, err = _run(capsys, "screen", DEMO / "batch", "--basis", basis, "--json")
    assert code == 0, err
    doc = json.loads(stdout)
    assert doc["mode"] == "batch" and "part_0047.png" in _flags(doc)


def test_mismatched_basis_is_refused_naming_both_sides(tmp_path, capsys):
    basis = tmp_path / "small.npz"
    assert _run(capsys, "fit", DEMO / "reference", "-o", basis, "--size", "64x48", "-q")[0] == 0
    code, _, err = _run(capsys, "screen", DEMO / "batch", "--basis", basis)
    assert code == 1
    assert "128x96" in err and "64x48" in err and "Traceback" not in err


@pytest.mark.parametrize("argv, message", [
    (["--limits", "analytic"], "needs --reference"),
    (["--reference", str(DEMO / "batch")], "is the folder being screened"),
    (["--reference", str(DEMO / "nowhere")], "no such file"),
])
def test_refusals(argv, message, capsys):
    code, _, err = _run(capsys, "screen", DEMO / "batch", *argv)
    assert code == 1 and message in err and "Traceback" not in err


def test_bad_alpha_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["screen", str(DEMO / "batch"), "--alpha", "2"])
    assert exc.value.code == 2 and "--alpha" in capsys.readouterr().err


def test_save_basis_does_not_overwrite(tmp_path, capsys):
    saved = tmp_path / "keep.npz"
    saved.write_bytes(b"precious")
    code, _, err = _run(capsys, "screen", DEMO / "batch", "--reference", DEMO / "reference",
                        "--save-basis", saved)
    assert code == 1 and "--overwrite" in err
    assert saved.read_bytes() == b"precious"


def test_unreadable_file_in_a_streamed_batch_is_skipped_and_listed(tmp_path, capsys):
    batch = tmp_path / "batch"
    shutil.copytree(DEMO / "batch", batch)
    (batch / "part_0100.png").write_bytes(b"not a png")
    saved = tmp_path / "s.npz"
    assert _run(capsys, "screen", DEMO / "reference", "--save-basis", saved, "-q")[0] in (0,)
    code, stdout, err = _run(capsys, "screen", batch, "--basis", saved, "--json", "--chunk", "16")
    assert code == 0, err
    doc = json.loads(stdout)
    assert len(doc["images"]) == 60
    assert [r["path"].split("/")[-1] for r in doc["rejected"]] == ["part_0100.png"]
    assert "part_0100.png" in err


def test_rgb_images_screen_end_to_end(tmp_path, capsys):
    rng = np.random.default_rng(0)
    base = rng.uniform(60, 190, (24, 32, 3))
    for name, n in (("ref", 40), ("batch", 25)):
        (tmp_path / name).mkdir()
        for i in range(n):
            img = base + rng.normal(0, 3, base.shape)
            if name == "batch" and i == 7:
                img[10:14, 20:24, 0] += 90
            Image.fromarray(np.clip(img, 0, 255).astype(np.uint8)).save(
                tmp_path / name / f"f_{i:03d}.png")
    code, stdout, err = _run(capsys, "screen", tmp_path / "batch", "--reference",
                             tmp_path / "ref", "-o", tmp_path / "out", "--json")
    assert code == 0, err
    doc = json.loads(stdout)
    hit = doc["images"][7]
    assert hit["flagged"] and 9 <= hit["peak"][0] <= 14 and 19 <= hit["peak"][1] <= 24


def test_a_basis_fitted_on_the_batch_itself_is_refused(tmp_path, capsys):
    basis = tmp_path / "own.npz"
    assert _run(capsys, "fit", DEMO / "batch", "-o", basis, "--rank", "10", "-q")[0] == 0
    code, _, err = _run(capsys, "screen", DEMO / "batch", "--basis", basis)
    assert code == 1 and "fitted on these very images" in err


def test_analytic_limits_through_the_cli(tmp_path, capsys):
    code, stdout, err = _run(capsys, "screen", DEMO / "batch", "--reference", DEMO / "reference",
                             "--limits", "analytic", "-o", tmp_path / "out", "--json")
    assert code == 0, err
    doc = json.loads(stdout)
    assert doc["limits_method"] == "analytic" and doc["local_limit"] is None
    assert all(i["local"] is None for i in doc["images"])
    assert "flag too many good frames" in err
    with open(tmp_path / "out" / "screen.csv", newline="") as fh:
        row = next(csv.DictReader(fh))
    assert row["local"] == "" and row["local_limit"] == ""
    assert "not used" in (tmp_path / "out" / "summary.txt").read_text()


def test_colour_and_depth_mismatches_are_refused(tmp_path, capsys):
    saved = tmp_path / "s.npz"
    assert _run(capsys, "screen", DEMO / "batch", "--reference", DEMO / "reference",
                "--save-basis", saved, "-q")[0] == 0
    rgb, deep = tmp_path / "rgb", tmp_path / "deep"
    rgb.mkdir()
    deep.mkdir()
    for i, src in enumerate(sorted((DEMO / "batch").glob("*.png"))[:3]):
        gray = np.asarray(Image.open(src))
        Image.fromarray(np.dstack([gray] * 3)).save(rgb / f"c{i}.png")
        Image.fromarray(gray.astype(np.uint16) * 257).save(deep / f"d{i}.png")
    code, _, err = _run(capsys, "screen", rgb, "--basis", saved)
    assert code == 1 and "colour" in err and "--color gray" in err
    code, _, err = _run(capsys, "screen", deep, "--basis", saved)
    assert code == 1 and "bit depth" in err and "16" in err and "8" in err


def test_a_later_chunk_of_another_size_names_where_it_starts(tmp_path, capsys):
    saved = tmp_path / "s.npz"
    assert _run(capsys, "screen", DEMO / "batch", "--reference", DEMO / "reference",
                "--save-basis", saved, "-q")[0] == 0
    batch = tmp_path / "batch"
    batch.mkdir()
    for src in sorted((DEMO / "batch").glob("*.png"))[:4]:
        shutil.copy(src, batch / src.name)
    Image.fromarray(np.zeros((50, 60), np.uint8)).save(batch / "z_small.png")
    code, _, err = _run(capsys, "screen", batch, "--basis", saved, "--chunk", "4")
    assert code == 1 and "z_small.png" in err and "60x50" in err


def test_align_through_the_cli_and_a_saved_basis(tmp_path, capsys):
    saved = tmp_path / "aligned.npz"
    code, first, err = _run(capsys, "screen", DEMO / "batch", "--reference", DEMO / "reference",
                            "--align", "--save-basis", saved, "-o", tmp_path / "out", "--json")
    assert code == 0, err
    first = json.loads(first)
    assert first["aligned"] and first["shift_limit"] > 0
    assert "part_0035.png" in _flags(first) and "shift" in _flags(first)["part_0035.png"]
    assert all(len(i["shift"]) == 2 for i in first["images"])
    header = (tmp_path / "out" / "screen.csv").read_text().splitlines()[0]
    assert header.endswith("shift,shift_d2,shift_limit")
    code, again, err = _run(capsys, "screen", DEMO / "batch", "--basis", saved, "--json")
    assert code == 0, err
    assert _flags(json.loads(again)) == _flags(first)


@pytest.mark.parametrize("argv, message", [
    (["--align"], "--align needs --reference"),
    (["--align", "--reference", str(DEMO / "reference"), "--limits", "analytic"],
     "not analytic"),
])
def test_align_refusals(argv, message, capsys):
    code, _, err = _run(capsys, "screen", DEMO / "batch", *argv)
    assert code == 1 and message in err
