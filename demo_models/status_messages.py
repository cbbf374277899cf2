"""Status messages of the meter reader: templates -> seeded messages -> padded word ids.

Transformation: ten invented message classes, each a few English templates with
random fillers (percentages, wheel numbers, times, readings, versions) and an
optional prefix/suffix -> a pool of distinct messages drawn with a seeded numpy
Generator -> stratified, disjoint train / calibration / validation split ->
word-level tokenizer (lower case, split on white space; vocabulary = words seen at
least twice in the training split; [PAD] = 0, [UNK] = 1) -> ``input_ids`` and
``attention_mask``, int64 [N, 16], padded on the right.

numpy and scikit-learn only; build.py trains the token model on the result.
"""
from __future__ import annotations

import logging
from collections import Counter
from dataclasses import dataclass

import numpy as np
from sklearn.model_selection import train_test_split

logger = logging.getLogger(__name__)

MAX_LEN = 16
PAD, UNK = "[PAD]", "[UNK]"
MIN_COUNT = 2  # a word seen once in training is as good as unknown; keeps readings and times out of the vocabulary
N_TRAIN, N_CALIB, N_VAL = 2000, 256, 400

# class name -> templates; {field} is drawn by FILLERS below.
TEMPLATES: dict[str, list[str]] = {
    "battery_low": ["battery low {pct} percent", "battery at {pct} percent replace soon",
                    "low battery {pct} percent left", "battery voltage {volt} v below limit"],
    "wheel_stuck": ["wheel {wheel} stuck", "counter wheel {wheel} not turning",
                    "wheel {wheel} jammed at digit {digit}", "wheel {wheel} has not moved for {hours} hours"],
    "cover_opened": ["cover opened at {time}", "housing cover open since {time}", "tamper switch cover lifted",
                     "cover closed again after {mins} minutes"],
    "reading_ok": ["reading ok {reading}", "read {reading} ok", "meter reading {reading} confirmed",
                   "reading {reading} sent to server"],
    "signal_weak": ["signal weak retry {retry}", "weak radio signal retry {retry} of {tries}",
                    "link quality poor rssi minus {db}", "no ack from gateway retry {retry}"],
    "camera_fault": ["camera focus lost", "lens dirty please clean window", "image too dark exposure {ms} ms",
                     "camera timeout after {ms} ms"],
    "temperature": ["temperature high {hot} degrees", "board too cold minus {cold} degrees",
                    "temperature out of range {hot} c"],
    "clock_sync": ["clock drift {secs} seconds resynced", "time sync failed retry {retry}", "clock reset to {time}"],
    "firmware": ["firmware update {ver} installed", "update {ver} failed checksum", "firmware {ver} rolled back"],
    "digit_unclear": ["digit {pos} unclear confidence {conf} percent", "low confidence on wheel {wheel}",
                      "reading unclear retake photo"],
}
CLASS_NAMES = list(TEMPLATES)
PREFIXES = ["", "", "", "info", "warn", "unit {unit}"]  # "" three times: half the messages have no prefix
SUFFIXES = ["", "", "", "", "at {time}", "code {code}", "please check"]


def _fillers(rng: np.random.Generator) -> dict[str, str]:
    """One random value per field; drawn in a fixed order so the stream is the same every build."""
    r = lambda lo, hi: int(rng.integers(lo, hi + 1))  # inclusive range
    return {
        "pct": str(r(1, 30)), "volt": f"{r(27, 33) / 10:.1f}", "wheel": str(r(1, 6)), "digit": str(r(0, 9)),
        "hours": str(r(2, 48)), "time": f"{r(0, 23):02d}:{r(0, 59):02d}", "mins": str(r(1, 30)),
        "reading": f"{r(0, 999999):06d}", "retry": str(r(1, 5)), "tries": str(r(3, 5)), "db": str(r(80, 120)),
        "ms": str(10 * r(5, 40)), "hot": str(r(45, 70)), "cold": str(r(5, 30)), "secs": str(r(2, 90)),
        "ver": f"{r(1, 3)}.{r(0, 9)}.{r(0, 9)}", "pos": str(r(1, 6)), "conf": str(r(20, 69)),
        "unit": str(r(100, 199)), "code": str(r(10, 99)),
    }


def message(cls: int, rng: np.random.Generator) -> str:
    """One random message of class ``cls``: [prefix] template [suffix], fillers substituted."""
    fill = _fillers(rng)
    templates = TEMPLATES[CLASS_NAMES[cls]]
    parts = [PREFIXES[int(rng.integers(len(PREFIXES)))], templates[int(rng.integers(len(templates)))],
             SUFFIXES[int(rng.integers(len(SUFFIXES)))]]
    return " ".join(p.format(**fill) for p in parts if p)


def message_pool(n: int, seed: int) -> tuple[list[str], np.ndarray]:
    """``n`` distinct messages, classes in turn (balanced); a duplicate text is drawn again."""
    rng = np.random.default_rng(seed)
    texts: list[str] = []
    seen: set[str] = set()
    classes = np.arange(n, dtype=np.int64) % len(CLASS_NAMES)
    for cls in classes:
        text = message(int(cls), rng)
        while text in seen:
            text = message(int(cls), rng)
        seen.add(text)
        texts.append(text)
    return texts, classes


def words(text: str) -> list[str]:
    """The tokenizer's only rule: lower case, split on white space."""
    return text.lower().split()


def make_vocab(texts: list[str]) -> list[str]:
    """[PAD], [UNK], then training words seen >= MIN_COUNT times, most frequent first, ties alphabetical."""
    counts = Counter(w for t in texts for w in words(t))
    kept = sorted((w for w, c in counts.items() if c >= MIN_COUNT), key=lambda w: (-counts[w], w))
    return [PAD, UNK, *kept]


def encode(texts: list[str], vocab: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Word ids and mask, int64 [N, MAX_LEN]; real words first, then [PAD] (id 0, mask 0)."""
    index = {w: i for i, w in enumerate(vocab)}
    ids = np.zeros((len(texts), MAX_LEN), dtype=np.int64)
    mask = np.zeros((len(texts), MAX_LEN), dtype=np.int64)
    for row, text in enumerate(texts):
        toks = [index.get(w, 1) for w in words(text)]
        if len(toks) > MAX_LEN:  # the templates stay below MAX_LEN; truncating would hide a template bug
            raise ValueError(f"message has {len(toks)} words, more than {MAX_LEN}: {text!r}")
        ids[row, :len(toks)] = toks
        mask[row, :len(toks)] = 1
    return ids, mask


@dataclass
class StatusSplits:
    """Texts, class ids, word ids and masks of the three disjoint sets, plus the vocabulary."""

    vocab: list[str]
    texts: dict[str, list[str]]  # "train" / "calib" / "val" -> messages
    classes: dict[str, np.ndarray]
    input_ids: dict[str, np.ndarray]
    attention_mask: dict[str, np.ndarray]


def make_status_splits(seed: int) -> StatusSplits:
    """Pool of distinct messages -> stratified val, then calib out of the rest (as for the digits) -> encode."""
    texts, classes = message_pool(N_TRAIN + N_CALIB + N_VAL, seed)
    idx = np.arange(len(texts))
    rest, val_idx = train_test_split(idx, test_size=N_VAL, stratify=classes, random_state=seed)
    train_idx, calib_idx = train_test_split(rest, test_size=N_CALIB, stratify=classes[rest],
                                            random_state=seed + 1)
    parts = {"train": np.sort(train_idx), "calib": np.sort(calib_idx), "val": np.sort(val_idx)}
    split_texts = {k: [texts[i] for i in v] for k, v in parts.items()}
    vocab = make_vocab(split_texts["train"])
    encoded = {k: encode(t, vocab) for k, t in split_texts.items()}
    lengths = encoded["train"][1].sum(axis=1)
    logger.info("status messages: vocabulary %d words, %d..%d words per message", len(vocab),
                lengths.min(), lengths.max())
    return StatusSplits(vocab=vocab, texts=split_texts, classes={k: classes[v] for k, v in parts.items()},
                        input_ids={k: e[0] for k, e in encoded.items()},
                        attention_mask={k: e[1] for k, e in encoded.items()})
