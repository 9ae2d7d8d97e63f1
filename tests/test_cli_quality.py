"""rebuild and choose through the command line, and the rank check on real images."""

import csv
import json

import numpy as np
import pytest
from PIL import Image

from imgreduce import fit_basis
from imgreduce.cli import main
from imgreduce.quality import choose_rank, cross_validated_curve, quality_curve


def _folder(tmp_path, name, n=24, shape=(16, 20), seed=0, rgb=False):
    folder = tmp_path / name
    folder.mkdir()
    rng = np.random.default_rng(seed)
    base = rng.uniform(60, 190, shape)
    modes = rng.standard_normal((3,) + shape) * 20
    for i in range(n):
        img = base + np.tensordot(rng.standard_normal(3), modes, 1) + rng.normal(0, 2, shape)
        arr = np.clip(img, 0, 255).astype(np.uint8)
        if rgb:
            arr = np.dstack([arr, arr[::-1], arr[:, ::-1]])
        Image.fromarray(arr).save(folder / f"f_{i:03d}.png")
    return folder


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_rebuild_writes_metrics_and_panels(tmp_path, capsys):
    train, batch = _folder(tmp_path, "train"), _folder(tmp_path, "batch", n=5, seed=1)
    basis = tmp_path / "b.npz"
    assert _run(capsys, "fit", train, "-o", basis, "--rank", "8", "-q")[0] == 0
    code, out, err = _run(capsys, "rebuild", batch, "--basis", basis, "--ranks", "2,8",
                          "--limit", "2", "--save-images", "-o", tmp_path / "out", "--json")
    assert code == 0
    doc = json.loads(out)
    assert doc["ranks"] == [2, 8] and doc["images"] == 5 and len(doc["metrics"]) == 10
    with open(tmp_path / "out" / "metrics.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0]) == ["path", "rank", "psnr", "ssim", "max_abs_error", "rmse",
                             "clipped_fraction"]
    # PSNR recomputed from the file's RMSE (source: PSNR = 20 log10(MAX / RMSE), MAX = 1).
    for row in rows:
        assert float(row["psnr"]) == pytest.approx(-20 * np.log10(float(row["rmse"])),
                                                   abs=2e-3)
    by_rank = {r: [float(x["psnr"]) for x in rows if x["rank"] == r] for r in ("2", "8")}
    assert np.mean(by_rank["8"]) > np.mean(by_rank["2"])
    panels = sorted(p.name for p in (tmp_path / "out").glob("panel_*.png"))
    assert panels == ["panel_f_000.png", "panel_f_001.png"]
    assert len(list((tmp_path / "out" / "rank_008").iterdir())) == 5


def test_rebuild_refuses_mismatched_basis_and_bad_ranks(tmp_path, capsys):
    train = _folder(tmp_path, "train")
    other = _folder(tmp_path, "other", n=4, shape=(16, 22))
    colour = _folder(tmp_path, "colour", n=4, rgb=True)
    basis = tmp_path / "b.npz"
    _run(capsys, "fit", train, "-o", basis, "--rank", "8", "-q")
    code, out, err = _run(capsys, "rebuild", other, "--basis", basis, "-o", tmp_path / "o",
                          "--ranks", "2")
    assert code == 1 and "22x16 gray 8-bit" in err and "20x16 gray 8-bit" in err
    code, out, err = _run(capsys, "rebuild", colour, "--basis", basis, "-o", tmp_path / "o",
                          "--ranks", "2")
    assert code == 1 and "colour differs" in err and "--color gray" in err
    code, out, err = _run(capsys, "rebuild", train, "--basis", basis, "-o", tmp_path / "o",
                          "--ranks", "5,20")
    assert code == 1 and "holds 8 components" in err
    with pytest.raises(SystemExit) as exc:
        main(["rebuild", str(train), "--basis", str(basis), "-o", "x", "--ranks", "a,b"])
    assert exc.value.code == 2
    code, out, err = _run(capsys, "rebuild", train, "--basis", basis, "-o", train, "--ranks", "2")
    assert code == 1 and "input folder" in err


def test_choose_json_contract_and_figures(tmp_path, capsys):
    src = _folder(tmp_path, "src", n=30)
    code, out, err = _run(capsys, "choose", src, "--target-psnr", "35", "--max-rank", "10",
                          "-o", tmp_path / "ch", "--json")
    assert code == 0
    doc = json.loads(out)
    assert doc["rule"] == "psnr" and doc["held_out"] is True and doc["folds"] == 5
    assert [p["rank"] for p in doc["curve"]] == list(range(1, 11))
    assert set(doc["curve"][0]) >= {"rank", "explained", "psnr_mean", "psnr_p05"}
    assert {"gavish_donoho", "broken_stick", "psnr"} <= set(doc["rules"])
    chosen = doc["curve"][doc["rank"] - 1]
    if doc["target_met"]:
        assert chosen["psnr_p05"] >= 35
        if doc["rank"] > 1:
            assert doc["curve"][doc["rank"] - 2]["psnr_p05"] < 35
    names = sorted(p.name for p in (tmp_path / "ch").iterdir())
    assert names == ["curve.csv", "quality_curves.png", "rank_strip.png"]


def test_choose_options_are_exclusive_and_checked(tmp_path, capsys):
    src = _folder(tmp_path, "src", n=12)
    with pytest.raises(SystemExit) as exc:
        main(["choose", str(src), "--target-psnr", "30", "--variance", "0.9"])
    assert exc.value.code == 2
    code, out, err = _run(capsys, "choose", src, "--variance", "90")
    assert code == 1 and "for 90% give 0.9" in err
    code, out, err = _run(capsys, "choose", src, "--max-rank", "50")
    assert code == 1 and "--max-rank" in err


def test_recommended_rank_meets_target_on_unseen_real_images():
    """source: scikit-learn load_digits() (1797 real 8x8 images): a rank chosen by k-fold
    on the first 1200 images for a 5th-percentile PSNR target meets that target (within
    sampling error of 0.3 dB) on the 597 images never used in the choice."""
    from sklearn.datasets import load_digits

    x = (load_digits().data / 16.0).astype(np.float32)
    choose_on, check_on = x[:1200], x[1200:]
    target = 22.0
    choice = choose_rank(choose_on, image_shape=(8, 8), target_psnr=target, max_rank=40)
    assert choice.target_met
    basis = fit_basis(choose_on, rank=choice.rank, exact=True)
    achieved = quality_curve(basis, check_on).psnr_percentile(5)[choice.rank]
    assert achieved >= target - 0.3
    # And one rank fewer would not have met it on the choosing images (smallest rank).
    assert choice.curve.psnr_percentile(5)[choice.rank - 1] < target


def test_held_out_curve_is_below_the_training_curve_on_real_faces():
    """source: skimage.data.lfw_subset() (real 25x25 faces): training images flatter every
    rank (REFERENCES.md: with p >> n the basis fits their noise)."""
    from skimage.data import lfw_subset

    x = lfw_subset()[:100].reshape(100, -1).astype(np.float32)
    held = cross_validated_curve(x, max_rank=30, folds=5).summary()["psnr_mean"]
    train = quality_curve(fit_basis(x, rank=30), x).summary()["psnr_mean"]
    assert np.all(train[5:] > held[5:] + 0.5)
