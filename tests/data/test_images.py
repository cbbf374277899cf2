"""Image folders: preprocessing against hand-computed tensors, class folders, streaming, refusals.

The expected tensors follow the formula documented in swapper/data/images.py:
value[c, i, j] = (p[c](i, j) · scale − mean[c]) / std[c] on the 8-bit pixels in
the chosen channel order; Pillow writes and reads the PNG files losslessly
(PNG is a lossless format, ISO/IEC 15948).
"""
from __future__ import annotations

import os

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper
from PIL import Image

from swapper import api
from swapper.core.model_io import load_model
from swapper.data import images as I
from swapper.data.dataset import InputSpec, batches, load_dataset
from swapper.data.images import ImagePrep
from swapper.data.source import data_source, prep_from_entries
from swapper.errors import BadDataError, UsageError

# a 2 x 3 RGB image (height 2, width 3) with known pixels: PIXELS[i][j] = (R, G, B)
PIXELS = [[(255, 0, 0), (0, 255, 0), (0, 0, 255)],
          [(10, 20, 30), (100, 150, 200), (255, 255, 255)]]


def png(path, pixels=PIXELS, mode="RGB"):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(np.asarray(pixels, dtype=np.uint8), mode).save(path)
    return path


def nchw(h="H", w="W", c=3, name="x"):
    return [InputSpec(name, np.dtype(np.float32), ("N", c, h, w))]


def test_bgr_mean_std_nchw_matches_the_hand_computed_tensor(tmp_path):
    png(tmp_path / "imgs" / "a.png")
    prep = ImagePrep(size=(2, 3), channels="BGR", scale=1 / 255, mean=(0.5, 0.4, 0.3), std=(0.2, 0.25, 0.5))
    ds = load_dataset(tmp_path / "imgs", nchw(), images=prep)
    got = next(batches(ds, 8)).feeds["x"]
    # channel 0 is B, 1 is G, 2 is R (BGR order), each (p/255 - mean[c]) / std[c]
    blue = [[0, 0, 255], [30, 200, 255]]
    green = [[0, 255, 0], [20, 150, 255]]
    red = [[255, 0, 0], [10, 100, 255]]
    want = np.array([[(np.array(blue) / 255 - 0.5) / 0.2,
                      (np.array(green) / 255 - 0.4) / 0.25,
                      (np.array(red) / 255 - 0.3) / 0.5]], dtype=np.float32)
    assert got.shape == (1, 3, 2, 3) and got.dtype == np.float32
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-6)


def test_nhwc_layout_and_gray_conversion(tmp_path):
    png(tmp_path / "imgs" / "a.png", [[(100, 100, 100), (255, 0, 0)]])
    spec = [InputSpec("x", np.dtype(np.float32), ("N", 1, 2, 1))]  # NHWC, one channel: H=1, W=2, C=1
    ds = load_dataset(tmp_path / "imgs", spec, images=ImagePrep(channels="gray", layout="NHWC", scale=1.0))
    got = next(batches(ds, 1)).feeds["x"]
    # Pillow's "L" conversion (its Image.convert documentation): L = R·299/1000 + G·587/1000 + B·114/1000
    # -> 100 for the grey pixel, round(76.245) = 76 for pure red
    np.testing.assert_array_equal(got, np.array([[[[100.0], [76.0]]]], np.float32))


def solid(path, h, w, rgb):
    return png(path, [[rgb] * w for _ in range(h)])


@pytest.mark.parametrize("align,rows", [("center", (1, 2)), ("start", (0, 1))])
def test_pad_keeps_the_aspect_ratio_and_fills_with_pad_value(tmp_path, align, rows):
    solid(tmp_path / "imgs" / "a.png", 2, 4, (200, 200, 200))  # 2 x 4 into 4 x 4: scale min(2, 1) = 1
    prep = ImagePrep(size=(4, 4), resize="pad", pad_value=7, pad_align=align, scale=1.0)
    got = next(batches(load_dataset(tmp_path / "imgs", nchw(), images=prep), 1)).feeds["x"][0, 0]
    want = np.full((4, 4), 7.0)
    want[list(rows)] = 200.0
    np.testing.assert_array_equal(got, want)


def test_crop_takes_the_centre_window(tmp_path):
    # 2 x 4 image, columns red red blue blue; into 2 x 2: scale max(1, 0.5) = 1, window = columns 1..2
    png(tmp_path / "imgs" / "a.png", [[(255, 0, 0), (255, 0, 0), (0, 0, 255), (0, 0, 255)]] * 2)
    prep = ImagePrep(size=(2, 2), resize="crop", scale=1.0)
    got = next(batches(load_dataset(tmp_path / "imgs", nchw(), images=prep), 1)).feeds["x"][0]
    np.testing.assert_array_equal(got[0], [[255, 0], [255, 0]])  # R: red column then blue column
    np.testing.assert_array_equal(got[2], [[0, 255], [0, 255]])  # B


def test_stretch_of_a_solid_image_stays_solid(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 5, 3, (40, 80, 120))
    got = next(batches(load_dataset(tmp_path / "imgs", nchw(), images=ImagePrep(size=(4, 6), scale=1.0)),
                       1)).feeds["x"][0]
    # bilinear interpolation of a constant is that constant
    for c, v in enumerate((40, 80, 120)):
        np.testing.assert_array_equal(got[c], np.full((4, 6), v))


def test_class_folders_become_sorted_labels_in_sorted_file_order(tmp_path):
    for cls, names, value in (("zebra", ["b.png", "a.png"], 30), ("ant", ["c.png"], 10)):
        for k, name in enumerate(names):
            solid(tmp_path / "imgs" / cls / name, 1, 1, (value + k, 0, 0))
    ds = load_dataset(tmp_path / "imgs", nchw(1, 1), images=ImagePrep(scale=1.0), require_labels=True)
    assert ds.classes == ["ant", "zebra"] and ds.labels.tolist() == [0, 1, 1]
    batch = next(batches(ds, 8))
    assert batch.feeds["x"][:, 0, 0, 0].tolist() == [10.0, 31.0, 30.0]  # ant/c, zebra/a, zebra/b


def test_images_are_decoded_only_batch_by_batch(tmp_path, monkeypatch):
    for k in range(5):
        solid(tmp_path / "imgs" / f"{k}.png", 1, 1, (k, k, k))
    calls = []
    real = I.load_image
    monkeypatch.setattr(I, "load_image", lambda *a: calls.append(a[0].name) or real(*a))
    ds = load_dataset(tmp_path / "imgs", nchw(1, 1), images=ImagePrep())
    assert calls == []  # loading checks headers only
    it = batches(ds, 2)
    next(it)
    assert calls == ["0.png", "1.png"]


def test_the_model_fixes_the_size_and_layout_when_not_given(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 3, 3, (1, 2, 3))
    ds = load_dataset(tmp_path / "imgs", [InputSpec("x", np.dtype(np.float32), (1, 4, 5, 3))],
                      images=ImagePrep(scale=1.0))
    assert next(batches(ds, 1)).feeds["x"].shape == (1, 4, 5, 3)  # NHWC from the trailing 3


def error(folder, specs=None, prep=None):
    with pytest.raises(BadDataError) as e:
        load_dataset(folder, specs or nchw(1, 1), images=prep or ImagePrep())
    msg = str(e.value)
    assert "\n" not in msg and "Traceback" not in msg
    return msg


def test_unknown_size_is_asked_for(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 2, 2, (0, 0, 0))
    assert "give the size" in error(tmp_path / "imgs", nchw())


def test_bad_files_are_named_in_one_line(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 1, 1, (0, 0, 0))
    (tmp_path / "imgs" / "notes.txt").write_text("skipped")
    (tmp_path / "imgs" / "b.png").write_bytes(b"this is not a picture")
    msg = error(tmp_path / "imgs")
    assert str(tmp_path / "imgs" / "b.png") in msg and "not a PNG or JPEG image" in msg


def test_truncated_png_is_named(tmp_path):
    good = solid(tmp_path / "src.png", 8, 8, (9, 9, 9)).read_bytes()
    (tmp_path / "imgs").mkdir()
    (tmp_path / "imgs" / "a.png").write_bytes(good[:40])
    msg = error(tmp_path / "imgs")
    assert str(tmp_path / "imgs" / "a.png") in msg


def test_symlink_leaving_the_folder_is_refused(tmp_path):
    solid(tmp_path / "outside.png", 1, 1, (0, 0, 0))
    (tmp_path / "imgs").mkdir()
    os.symlink(tmp_path / "outside.png", tmp_path / "imgs" / "a.png")
    assert "symbolic link leaving the folder" in error(tmp_path / "imgs")


def test_link_inside_the_folder_is_fine(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 1, 1, (0, 0, 0))
    os.symlink(tmp_path / "imgs" / "a.png", tmp_path / "imgs" / "b.png")
    assert load_dataset(tmp_path / "imgs", nchw(1, 1), images=ImagePrep()).n == 2


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no named pipes here")
def test_named_pipe_is_refused(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 1, 1, (0, 0, 0))
    os.mkfifo(tmp_path / "imgs" / "b.png")
    assert "not a regular file" in error(tmp_path / "imgs")


def test_decompression_bomb_guard(tmp_path, monkeypatch):
    solid(tmp_path / "imgs" / "a.png", 2, 3, (0, 0, 0))
    monkeypatch.setattr(I, "MAX_PIXELS", 5)  # 6 pixels is "absurd" for this run
    assert "decompression-bomb guard" in error(tmp_path / "imgs")


def test_mixed_images_and_class_folders_refused(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 1, 1, (0, 0, 0))
    solid(tmp_path / "imgs" / "cat" / "b.png", 1, 1, (0, 0, 0))
    assert "mixes images and class sub-folders" in error(tmp_path / "imgs")


def test_a_folder_with_npy_files_keeps_meaning_arrays(tmp_path):
    solid(tmp_path / "d" / "a.png", 1, 1, (0, 0, 0))
    np.save(tmp_path / "d" / "x.npy", np.zeros((2, 3, 1, 1), np.float32))
    assert load_dataset(tmp_path / "d", nchw(1, 1)).arrays["x"].shape == (2, 3, 1, 1)


def test_a_folder_of_neither_says_what_it_looked_for(tmp_path):
    (tmp_path / "d").mkdir()
    (tmp_path / "d" / "readme.md").write_text("hello")
    assert "no .npy files and no PNG/JPEG images" in error(tmp_path / "d")


def test_image_folder_needs_one_image_input(tmp_path):
    solid(tmp_path / "imgs" / "a.png", 1, 1, (0, 0, 0))
    specs = nchw(1, 1) + [InputSpec("sr", np.dtype(np.int64), ())]
    assert "--constant" in error(tmp_path / "imgs", specs)


@pytest.mark.parametrize("option,needle", [("size=48", "height x width"), ("resize=zoom", "stretch, crop, pad"),
                                           ("mean=0.1,0.2", "needs 1 or 3"), ("scale=1/0", "fraction"),
                                           ("colour=RGB", "unknown image setting"),
                                           ("size=48x100000", "side above 8192")])  # a typo seen in a trial
def test_bad_prep_options_name_the_option(tmp_path, option, needle):
    with pytest.raises(UsageError) as e:
        data_source(tmp_path, prep=[option])
    assert f"--prep {option}" in str(e.value) and needle in str(e.value)


def test_prep_options_override_the_description_file(tmp_path):
    spec = tmp_path / "data.json"
    spec.write_text('{"images": {"size": [48, 192], "channels": "bgr", "scale": "1/255", "mean": [0.5]}}')
    src = data_source(tmp_path, description=spec, prep=["size=32x100", "std=0.5"])
    assert src.images == ImagePrep(size=(32, 100), channels="BGR", scale=1 / 255, mean=(0.5,), std=(0.5,))
    assert prep_from_entries({"channels": "grey"}, "x").channel_count() == 1


def test_api_load_data_reads_an_image_folder_for_a_model(tmp_path):
    # the model's input fixes 3 x 2 x 3; onnxruntime returns the feeds the folder gives unchanged
    png(tmp_path / "imgs" / "a.png")
    graph = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "g",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3, 2, 3])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 3, 2, 3])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, tmp_path / "m.onnx")
    loaded = load_model(tmp_path / "m.onnx")
    ds = api.load_data(data_source(tmp_path / "imgs", prep=["scale=1", "layout=NCHW"]), loaded)
    feeds = next(batches(ds, 1)).feeds
    y = ort.InferenceSession(str(tmp_path / "m.onnx"), providers=["CPUExecutionProvider"]).run(None, feeds)[0]
    assert y[0, 0].tolist() == [[255, 0, 0], [10, 100, 255]]  # channel R, as written


def classifier(path):
    """x [N, 3, 6, 6] -> Conv 4 -> Tanh -> GlobalAveragePool -> Flatten -> MatMul -> 2 logits."""
    nd = helper.make_node
    rng = np.random.default_rng(0)
    graph = helper.make_graph(
        [nd("Conv", ["x", "W"], ["c"], pads=[1, 1, 1, 1]), nd("Tanh", ["c"], ["t"]),
         nd("GlobalAveragePool", ["t"], ["g"]), nd("Flatten", ["g"], ["f"]), nd("MatMul", ["f", "V"], ["y"])],
        "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3, 6, 6])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 2])],
        [onnx.numpy_helper.from_array(rng.standard_normal((4, 3, 3, 3)).astype(np.float32), "W"),
         onnx.numpy_helper.from_array(np.array([[1, -1]] * 4, np.float32), "V")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, path)
    return path


def test_cli_swap_from_image_folders_reports_the_class_mapping(tmp_path):
    import hashlib
    import json

    from typer.testing import CliRunner

    from swapper.cli.app import app

    rng = np.random.default_rng(3)
    for split in ("calib", "val"):
        for cls in ("dark", "bright"):
            for k in range(6):
                base = 40 if cls == "dark" else 200
                png(tmp_path / split / cls / f"{k}.png",
                    (base + rng.integers(-30, 30, size=(9, 7, 3))).clip(0, 255))
    out, report = tmp_path / "out.onnx", tmp_path / "report"
    result = CliRunner().invoke(app, ["swap", str(classifier(tmp_path / "m.onnx")), "-o", str(out),
                                      "--calib", str(tmp_path / "calib"), "--val", str(tmp_path / "val"), "--plan", "all",
                                      "--prep", "size=6x6", "--prep", "mean=0.5", "--budget", "100",
                                      "--report", str(report)])
    assert result.exit_code == 0, result.output
    entry = json.loads((report / "report.json").read_text())["inputs"]["validation"]
    assert entry["classes"] == {"bright": 0, "dark": 1}  # sorted folder names -> 0..K-1
    digest = hashlib.sha256()  # source: hashlib over the sorted relative paths and each file's sha256
    files = sorted((tmp_path / "val").rglob("*.png"))
    for f in files:
        digest.update(f.relative_to(tmp_path / "val").as_posix().encode())
        digest.update(hashlib.sha256(f.read_bytes()).digest())
    assert entry["sha256"] == digest.hexdigest() and entry["bytes"] == sum(f.stat().st_size for f in files)
