"""Reading image folders: formats, depths, policies and every bad-input case."""

import struct
import zlib

import numpy as np
import pytest
from PIL import Image

from imgreduce._files import write_image
from imgreduce.errors import InputError, ParameterError
from imgreduce.ingest import parse_size, read_images


def _gray(tmp_path, name, value, shape=(6, 8), dtype=np.uint8):
    arr = np.full(shape, value, dtype=dtype)
    arr[0, 0] = 0
    Image.fromarray(arr).save(tmp_path / name)
    return arr


def _snapshot(folder):
    return {p.name: p.read_bytes() for p in folder.iterdir()}


@pytest.mark.parametrize("suffix", [".png", ".tif", ".bmp", ".webp"])
def test_lossless_formats_round_trip_8bit(tmp_path, suffix):
    rng = np.random.default_rng(0)
    arrs = [rng.integers(0, 256, (5, 7), dtype=np.uint8) for _ in range(3)]
    for i, a in enumerate(arrs):
        Image.fromarray(a).save(tmp_path / f"img{i}{suffix}", **(
            {"lossless": True} if suffix == ".webp" else {}))
    # WebP has no gray mode: it stores three equal channels, read back here as luma.
    stack = read_images(tmp_path, color="gray" if suffix == ".webp" else None)
    assert stack.pixels.dtype == np.float32 and stack.image_shape == (5, 7)
    assert stack.color == "gray" and stack.bit_depth == 8
    expected = np.stack(arrs).reshape(3, -1).astype(np.float32) / np.float32(255)
    np.testing.assert_allclose(stack.pixels, expected, rtol=0, atol=1e-6)


def test_jpeg_reads_as_8bit(tmp_path):
    for i in range(2):
        Image.fromarray(np.full((8, 8, 3), 40 * (i + 1), np.uint8)).save(tmp_path / f"{i}.jpg")
    stack = read_images(tmp_path)
    assert stack.image_shape == (8, 8, 3) and stack.color == "rgb"
    np.testing.assert_allclose(stack.pixels[1], 80 / 255, atol=2 / 255)


def test_16bit_values_survive_exactly(tmp_path):
    # Values chosen to catch any 8-bit truncation: 1, 257 and 65534 have no 8-bit equivalent.
    values = np.array([[0, 1, 257, 65534, 65535, 4095]], dtype=np.uint16)
    Image.fromarray(values).save(tmp_path / "d0.png")  # 16-bit gray PNG (Pillow)
    Image.fromarray(values).save(tmp_path / "d1.tif")  # 16-bit gray TIFF (tifffile)
    stack = read_images(tmp_path)
    assert stack.bit_depth == 16
    np.testing.assert_array_equal(np.rint(stack.pixels * 65535).astype(np.uint16),
                                  np.vstack([values.ravel(), values.ravel()]))


def test_write_image_read_back_is_identical(tmp_path):
    # source: skimage.data.camera(), a real photograph shipped with scikit-image.
    from skimage.data import camera

    cam = camera()[:64, :80]
    write_image(tmp_path / "a.png", cam / 255.0)
    write_image(tmp_path / "b.png", cam[::-1] / 255.0)
    stack = read_images(tmp_path)
    np.testing.assert_array_equal(np.rint(stack.images(0) * 255).astype(np.uint8), cam)
    out = tmp_path / "out"
    out.mkdir()
    write_image(out / "c.png", stack.images(0), bit_depth=16)
    write_image(out / "d.png", stack.images(1), bit_depth=16)
    again = read_images(out)
    np.testing.assert_allclose(again.pixels, stack.pixels, atol=1 / 65535)


def test_16bit_rgb_tiff_is_exact_and_16bit_rgb_png_is_refused(tmp_path):
    rgb = np.zeros((4, 5, 3), np.uint16)
    rgb[..., 0], rgb[..., 1], rgb[..., 2] = 1, 257, 65535
    write_image(tmp_path / "a.tif", rgb / 65535, bit_depth=16)
    write_image(tmp_path / "b.tif", rgb[::-1] / 65535, bit_depth=16)
    stack = read_images(tmp_path)
    assert stack.image_shape == (4, 5, 3) and stack.bit_depth == 16
    np.testing.assert_array_equal(np.rint(stack.images(0) * 65535), rgb)
    # A 16-bit colour PNG header (colour type 2, depth 16): Pillow would keep 8 bits.
    png = tmp_path / "c.png"
    _write_png_header(png, 5, 4, depth=16, colour_type=2)
    stack = read_images(tmp_path)
    assert [r.path for r in stack.rejected] == [str(png)]
    assert "16-bit colour PNG" in stack.rejected[0].reason


def test_12bit_in_16bit_container(tmp_path):
    # source: REFERENCES.md — 12-bit data stored in 16-bit containers needs MAX = 4095.
    for i in range(2):
        Image.fromarray(np.array([[0, 2048, 4095]], np.uint16)).save(tmp_path / f"{i}.png")
    stack = read_images(tmp_path, bits=12)
    assert stack.bit_depth == 12
    np.testing.assert_allclose(stack.pixels[0], [0, 2048 / 4095, 1.0], rtol=1e-6)
    Image.fromarray(np.array([[0, 5000, 4095]], np.uint16)).save(tmp_path / "2.png")
    with pytest.raises(InputError, match=r"2\.png has sample value 5000, above 4095"):
        read_images(tmp_path, bits=12)


def test_luma_uses_bt601_weights(tmp_path):
    # source: ITU-R BT.601 luma Y = 0.299 R + 0.587 G + 0.114 B (Pillow's "L" conversion).
    rgb = np.zeros((2, 3, 3), np.uint8)
    rgb[0, 0] = (255, 0, 0)
    rgb[0, 1] = (0, 255, 0)
    rgb[0, 2] = (0, 0, 255)
    rgb[1] = (10, 200, 30)
    Image.fromarray(rgb).save(tmp_path / "a.png")
    Image.fromarray(rgb[::-1].copy()).save(tmp_path / "b.png")
    stack = read_images(tmp_path, color="gray")
    np.testing.assert_allclose(stack.images(0)[0], [0.299, 0.587, 0.114], rtol=1e-6)
    pil = np.asarray(Image.fromarray(rgb).convert("L"), dtype=np.float64) / 255
    np.testing.assert_allclose(stack.images(0), pil, atol=0.5 / 255 + 1e-7)


def test_palette_rgba_and_gray_to_rgb(tmp_path):
    base = np.zeros((4, 4, 3), np.uint8)
    base[:2] = (200, 10, 10)
    Image.fromarray(base).convert("P", palette=Image.Palette.ADAPTIVE).save(tmp_path / "p.png")
    rgba = np.dstack([base, np.full((4, 4), 128, np.uint8)])
    Image.fromarray(rgba).save(tmp_path / "q.png")
    stack = read_images(tmp_path)
    assert stack.color == "rgb"
    np.testing.assert_allclose(stack.images(0), stack.images(1), atol=1 / 255)
    np.testing.assert_allclose(stack.images(1)[0, 0], np.array([200, 10, 10]) / 255, rtol=1e-6)
    _gray(tmp_path, "r.png", 50, shape=(4, 4))
    with pytest.raises(InputError, match=r"mix gray and colour.*--color gray or --color rgb"):
        read_images(tmp_path)
    both = read_images(tmp_path, color="rgb")
    assert both.image_shape == (4, 4, 3)
    np.testing.assert_array_equal(both.images(2)[..., 0], both.images(2)[..., 2])


def test_natural_sort_recursive_and_file_lists(tmp_path):
    for i in (10, 2, 1):
        _gray(tmp_path, f"frame_{i}.png", i)
    (tmp_path / "sub").mkdir()
    _gray(tmp_path / "sub", "frame_3.png", 3)
    (tmp_path / "notes.txt").write_text("not an image, ignored")
    (tmp_path / ".hidden.png").write_bytes(b"ignored")
    names = [p.split("/")[-1] for p in read_images(tmp_path).paths]
    assert names == ["frame_1.png", "frame_2.png", "frame_10.png"]
    assert len(read_images(tmp_path, recursive=True).paths) == 4
    files = [tmp_path / "frame_10.png", tmp_path / "frame_1.png"]
    assert read_images(files).n_images == 2


def test_bad_files_are_skipped_and_listed_nothing_changed(tmp_path):
    for i in range(3):
        _gray(tmp_path, f"ok{i}.png", 40 * i)
    (tmp_path / "junk.png").write_text("this is not a PNG")
    good = (tmp_path / "ok0.png").read_bytes()
    (tmp_path / "cut.png").write_bytes(good[: len(good) // 2])
    before = _snapshot(tmp_path)
    stack = read_images(tmp_path)
    assert stack.n_images == 3
    reasons = {r.path.split("/")[-1]: r.reason for r in stack.rejected}
    assert set(reasons) == {"junk.png", "cut.png"}
    assert "not an image file" in reasons["junk.png"]
    with pytest.raises(InputError, match="cut.png|junk.png"):
        read_images(tmp_path, strict=True)
    assert _snapshot(tmp_path) == before


def test_mixed_sizes_list_counts_and_suggest_size(tmp_path):
    for i in range(3):
        _gray(tmp_path, f"a{i}.png", 10, shape=(480, 640))
    _gray(tmp_path, "frame_017.png", 10, shape=(480, 641))
    with pytest.raises(InputError) as err:
        read_images(tmp_path)
    msg = str(err.value)
    assert "640x480: 3 files" in msg and "641x480: 1 file (e.g. frame_017.png)" in msg
    assert "--size 640x480" in msg
    stack = read_images(tmp_path, size="64x48")
    assert stack.image_shape == (48, 64) and stack.size_policy == (64, 48)
    assert stack.pixels.min() >= 0 and stack.pixels.max() <= 1


def test_mixed_bit_depths_refused(tmp_path):
    _gray(tmp_path, "a.png", 10)
    _gray(tmp_path, "b.png", 1000, dtype=np.uint16)
    with pytest.raises(InputError, match=r"mix bit depths.*8-bit: 1 file.*16-bit: 1 file"):
        read_images(tmp_path)


def test_missing_empty_single_and_imageless_folders(tmp_path):
    with pytest.raises(InputError, match="no such file or folder"):
        read_images(tmp_path / "nope")
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(InputError, match="empty folder"):
        read_images(empty)
    docs = tmp_path / "docs"
    docs.mkdir()
    (docs / "a.txt").write_text("x")
    with pytest.raises(InputError, match="no image files"):
        read_images(docs)
    one = tmp_path / "one"
    one.mkdir()
    _gray(one, "a.png", 1)
    with pytest.raises(InputError, match="at least 2 images"):
        read_images(one)
    nested = tmp_path / "nested"
    (nested / "day1").mkdir(parents=True)
    _gray(nested / "day1", "a.png", 1)
    with pytest.raises(InputError, match="--recursive"):
        read_images(nested)


def _write_png_header(path, width, height, *, depth=8, colour_type=0):
    """A PNG with a valid IHDR and a tiny (wrong-size) image body."""
    def chunk(kind, data):
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))
    ihdr = struct.pack(">IIBBBBB", width, height, depth, colour_type, 0, 0, 0)
    body = zlib.compress(b"\x00" * 8)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", body)
                     + chunk(b"IEND", b""))


def test_decompression_bomb_rejected_without_allocating(tmp_path):
    for i in range(2):
        _gray(tmp_path, f"ok{i}.png", 5)
    _write_png_header(tmp_path / "bomb.png", 100_000, 100_000)  # claims 10^10 pixels
    stack = read_images(tmp_path)
    assert stack.n_images == 2
    assert "bomb.png" in stack.rejected[0].path
    assert "decompression bomb" in stack.rejected[0].reason


def test_memory_mapped_output(tmp_path):
    for i in range(3):
        _gray(tmp_path, f"{i}.png", 30 * i)
    target = tmp_path / "pixels.npy"
    stack = read_images(tmp_path, out=target)
    assert isinstance(stack.pixels, np.memmap)
    np.testing.assert_array_equal(np.load(target), read_images(tmp_path).pixels)
    with pytest.raises(InputError, match="already exists"):
        read_images(tmp_path, out=target)


def test_parse_size_and_bad_options():
    assert parse_size("640x480") == (640, 480) and parse_size((3, 2)) == (3, 2)
    with pytest.raises(ParameterError, match="WxH"):
        parse_size("640-480")
    with pytest.raises(ParameterError, match="color must be"):
        read_images("x", color="grey")
    with pytest.raises(ParameterError, match="bits must be between"):
        read_images("x", bits=17)
