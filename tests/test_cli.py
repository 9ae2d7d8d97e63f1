"""Command line: fit, show, demo, exit codes and one-line errors for user mistakes."""

import json

import numpy as np
import pytest
from PIL import Image

from imgreduce.cli import main


def _folder(tmp_path, n=8, shape=(12, 16), name="imgs", seed=0):
    folder = tmp_path / name
    folder.mkdir()
    rng = np.random.default_rng(seed)
    base = rng.integers(60, 200, shape)
    for i in range(n):
        arr = np.clip(base + rng.normal(0, 8, shape), 0, 255).astype(np.uint8)
        Image.fromarray(arr).save(folder / f"frame_{i + 1:03d}.png")
    return folder


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_fit_json_contract_and_show(tmp_path, capsys):
    src = _folder(tmp_path)
    basis = tmp_path / "b.npz"
    code, out, err = _run(capsys, "fit", str(src), "-o", str(basis), "--rank", "4", "--json")
    assert code == 0
    doc = json.loads(out)  # stdout holds exactly one JSON document
    for key in ("images", "rejected", "height", "width", "channels", "rank",
                "singular_values", "explained_variance_ratio", "seconds"):
        assert key in doc
    assert (doc["images"], doc["height"], doc["width"], doc["channels"], doc["rank"]) == \
        (8, 12, 16, 1, 4)
    assert len(doc["singular_values"]) == 4 and doc["rejected"] == []
    code, out, err = _run(capsys, "show", str(basis), "-o", str(tmp_path / "figs"), "--json")
    assert code == 0
    written = json.loads(out)["written"]
    assert sorted(p.split("/")[-1] for p in written) == ["components.png", "mean.png",
                                                         "spectrum.png"]


def test_quiet_prints_nothing(tmp_path, capsys):
    src = _folder(tmp_path)
    code, out, err = _run(capsys, "fit", str(src), "-o", str(tmp_path / "b.npz"), "--quiet")
    assert code == 0 and out == "" and err == ""


def test_rejected_files_are_warned_and_listed(tmp_path, capsys):
    src = _folder(tmp_path)
    (src / "broken.png").write_bytes(b"not a png")
    code, out, err = _run(capsys, "fit", str(src), "-o", str(tmp_path / "b.npz"), "--json")
    assert code == 0
    assert json.loads(out)["rejected"][0]["path"].endswith("broken.png")
    assert "skipped" in err and "broken.png" in err
    code, out, err = _run(capsys, "fit", str(src), "-o", str(tmp_path / "c.npz"), "--strict")
    assert code == 1 and "broken.png" in err


@pytest.mark.parametrize("case, needle", [
    ("missing", "no such file or folder"),
    ("empty", "empty folder"),
    ("one", "at least 2 images"),
    ("sizes", "--size 16x12"),
    ("colours", "--color gray or --color rgb"),
    ("rank", "give at most 7 components"),
])
def test_bad_input_exit_1_with_one_line_message(tmp_path, capsys, case, needle):
    src = _folder(tmp_path)
    args = ["fit", str(src), "-o", str(tmp_path / "b.npz")]
    if case == "missing":
        args[1] = str(tmp_path / "nowhere")
    elif case == "empty":
        (tmp_path / "e").mkdir()
        args[1] = str(tmp_path / "e")
    elif case == "one":
        args[1] = str(src / "frame_001.png")
    elif case == "sizes":
        Image.fromarray(np.zeros((13, 16), np.uint8)).save(src / "odd.png")
    elif case == "colours":
        Image.fromarray(np.zeros((12, 16, 3), np.uint8)).save(src / "colour.png")
    elif case == "rank":
        args += ["--rank", "8"]
    before = sorted(p.name for p in src.iterdir())
    code, out, err = _run(capsys, *args)
    assert code == 1
    assert needle in err and "Traceback" not in err
    assert err.startswith("imgreduce: error: ") and err.count("\n") == 1
    assert not (tmp_path / "b.npz").exists()
    assert sorted(p.name for p in src.iterdir()) == before


def test_usage_errors_exit_2(tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["fit", str(tmp_path), "-o", "b.npz", "--size", "big"])
    assert exc.value.code == 2
    assert "WxH" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["fit", str(tmp_path)])
    assert exc.value.code == 2


def test_existing_basis_is_not_overwritten(tmp_path, capsys):
    src = _folder(tmp_path)
    target = tmp_path / "b.npz"
    target.write_bytes(b"precious")
    code, out, err = _run(capsys, "fit", str(src), "-o", str(target))
    assert code == 1 and "--overwrite" in err
    assert target.read_bytes() == b"precious"
    assert _run(capsys, "fit", str(src), "-o", str(target), "--overwrite")[0] == 0
    code, out, err = _run(capsys, "fit", str(src), "-o", str(tmp_path / "b.png"))
    assert code == 1 and "should end in .npz" in err


def test_show_refuses_a_foreign_file(tmp_path, capsys):
    bad = tmp_path / "x.npz"
    np.savez(bad, a=np.zeros(2))
    code, out, err = _run(capsys, "show", str(bad), "-o", str(tmp_path / "f"))
    assert code == 1 and "not an imgreduce basis" in err


def test_help_shows_examples(capsys):
    for command in ("fit", "show", "demo"):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        assert "examples:" in capsys.readouterr().out


def test_demo_command(tmp_path, capsys):
    code, out, err = _run(capsys, "demo", "-o", str(tmp_path / "d"), "--json")
    assert code == 0
    doc = json.loads(out)
    # basis, 7 figures, the control chart, screen.csv and one overlay per flagged frame
    assert doc["images"] == 120
    assert len(doc["written"]) == 10 + doc["screen"]["flagged"]
