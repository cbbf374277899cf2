"""The status-message encoder: word ids + mask -> unit-length 32-d embedding.

Transformation: ``input_ids`` / ``attention_mask`` int64 [batch, 16] -> word
embedding + learned position embedding -> 2 pre-norm encoder layers (2-head
self-attention whose keys at padding positions get -1e9 before Softmax, then
LayerNorm, MLP 32 -> 128 -> exact GELU -> 32) -> final LayerNorm -> mean over the
real tokens only -> Linear 32 -> 32 -> L2 normalisation. Trained with a linear
class head on the embedding (cross-entropy over the message classes); only the
encoder is exported, with the TorchScript-based exporter at opset 17, where
``nn.GELU()`` becomes the Erf decomposition and ``nn.LayerNorm`` a single
LayerNormalization node.

Padding never reaches the output: Softmax gives masked keys a weight of exactly 0
(exp(-1e9) underflows) and the pooling skips them, and every other op works on
one position at a time.
"""
from __future__ import annotations

import io
import logging
import warnings

import numpy as np
import onnx
import onnxruntime as ort
import torch
from sklearn.metrics import accuracy_score
from sklearn.neighbors import NearestCentroid
from torch import nn

from status_messages import MAX_LEN, StatusSplits  # sibling in demo_models/

logger = logging.getLogger(__name__)

D_MODEL, HEADS, HIDDEN, LAYERS, D_OUT = 32, 2, 128, 2, 32
INPUTS = ("input_ids", "attention_mask")
OUTPUT = "embedding"
MASKED = -1e9  # added to attention scores of padding keys; Softmax turns it into an exact 0 weight


class SelfAttention(nn.Module):
    """Multi-head scaled dot-product attention with an additive key mask [batch, 1, 1, T]."""

    def __init__(self, d: int, heads: int):
        super().__init__()
        self.heads, self.head_dim = heads, d // heads
        self.qkv = nn.Linear(d, 3 * d)
        self.out = nn.Linear(d, d)

    def forward(self, x: torch.Tensor, key_bias: torch.Tensor) -> torch.Tensor:
        # -1 for the batch axis keeps Shape/Gather ops out of the exported graph (T and d are fixed)
        qkv = self.qkv(x).reshape(-1, MAX_LEN, 3, self.heads, self.head_dim).permute(2, 0, 3, 1, 4)
        q, k, v = qkv[0], qkv[1], qkv[2]
        scores = (q * self.head_dim ** -0.5) @ k.transpose(-2, -1) + key_bias
        ctx = scores.softmax(dim=-1) @ v  # [batch, heads, T, head_dim]
        return self.out(ctx.transpose(1, 2).reshape(-1, MAX_LEN, self.heads * self.head_dim))


class EncoderLayer(nn.Module):
    """Pre-norm transformer layer: x + Attn(LN(x)), then + MLP(LN(.)) with exact GELU."""

    def __init__(self, d: int, heads: int, hidden: int):
        super().__init__()
        self.norm1 = nn.LayerNorm(d)
        self.attn = SelfAttention(d, heads)
        self.norm2 = nn.LayerNorm(d)
        self.mlp = nn.Sequential(nn.Linear(d, hidden), nn.GELU(), nn.Linear(hidden, d))

    def forward(self, x: torch.Tensor, key_bias: torch.Tensor) -> torch.Tensor:
        x = x + self.attn(self.norm1(x), key_bias)
        return x + self.mlp(self.norm2(x))


class StatusEncoder(nn.Module):
    """(input_ids, attention_mask) int64 [batch, 16] -> L2-normalised embedding float32 [batch, 32]."""

    def __init__(self, vocab_size: int):
        super().__init__()
        self.words = nn.Embedding(vocab_size, D_MODEL)
        self.positions = nn.Parameter(torch.randn(MAX_LEN, D_MODEL) * 0.02)
        self.layers = nn.ModuleList([EncoderLayer(D_MODEL, HEADS, HIDDEN) for _ in range(LAYERS)])
        self.norm = nn.LayerNorm(D_MODEL)
        self.proj = nn.Linear(D_MODEL, D_OUT)

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        keep = attention_mask.to(torch.float32)
        key_bias = ((1.0 - keep) * MASKED)[:, None, None, :]
        x = self.words(input_ids) + self.positions
        for layer in self.layers:
            x = layer(x, key_bias)
        x = self.norm(x)
        weights = keep[:, :, None]
        pooled = (x * weights).sum(dim=1) / weights.sum(dim=1).clamp(min=1.0)  # mean over real tokens
        y = self.proj(pooled)
        # y / max(|y|, eps) as F.normalize computes it, written with a keepdim norm so the
        # exported Div broadcasts [batch, 1] and shape inference keeps the output at [batch, 32]
        return y / y.norm(p=2, dim=-1, keepdim=True).clamp(min=1e-12)


class StatusClassifier(nn.Module):
    """Training wrapper: the encoder plus a linear class head on its embedding (the head is not exported)."""

    def __init__(self, vocab_size: int, n_classes: int):
        super().__init__()
        self.encoder = StatusEncoder(vocab_size)
        self.head = nn.Linear(D_OUT, n_classes)

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        return self.head(self.encoder(input_ids, attention_mask))


def train(data: StatusSplits, epochs: int, lr: float, batch: int, seed: int) -> StatusEncoder:
    """Adam on cross-entropy through the class head, seeded shuffling; returns the encoder in eval mode."""
    model = StatusClassifier(len(data.vocab), int(data.classes["train"].max()) + 1)
    ids = torch.from_numpy(data.input_ids["train"])
    mask = torch.from_numpy(data.attention_mask["train"])
    y = torch.from_numpy(data.classes["train"])
    gen = torch.Generator().manual_seed(seed)
    opt = torch.optim.Adam(model.parameters(), lr=lr)
    loss_fn = nn.CrossEntropyLoss()
    model.train()
    for epoch in range(epochs):
        order = torch.randperm(len(y), generator=gen)
        total = 0.0
        for start in range(0, len(y), batch):
            rows = order[start:start + batch]
            opt.zero_grad()
            loss = loss_fn(model(ids[rows], mask[rows]), y[rows])
            loss.backward()
            opt.step()
            total += float(loss.detach()) * len(rows)
        logger.debug("status encoder epoch %d loss %.4f", epoch, total / len(y))
    return model.encoder.eval()


def export(encoder: StatusEncoder, opset: int) -> bytes:
    """TorchScript-based exporter, dynamic batch axis, fixed input/output names."""
    buf = io.BytesIO()
    example = (torch.ones(2, MAX_LEN, dtype=torch.int64), torch.ones(2, MAX_LEN, dtype=torch.int64))
    axes = {name: {0: "batch"} for name in (*INPUTS, OUTPUT)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the legacy path announces its deprecation on every call
        torch.onnx.export(encoder, example, buf, dynamo=False, opset_version=opset, input_names=list(INPUTS),
                          output_names=[OUTPUT], do_constant_folding=True, dynamic_axes=axes)
    return buf.getvalue()


def session(model_bytes: bytes) -> ort.InferenceSession:
    """onnxruntime on CPU, one thread, for reproducible figures."""
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    return ort.InferenceSession(model_bytes, opts, providers=["CPUExecutionProvider"])


def embed(sess: ort.InferenceSession, ids: np.ndarray, mask: np.ndarray) -> np.ndarray:
    return sess.run([OUTPUT], {"input_ids": ids, "attention_mask": mask})[0]


def torch_gap(encoder: StatusEncoder, model_bytes: bytes, data: StatusSplits) -> float:
    """Largest |onnxruntime - torch| over the validation embeddings (the export must not change the model)."""
    ids, mask = data.input_ids["val"], data.attention_mask["val"]
    with torch.no_grad():
        want = encoder(torch.from_numpy(ids), torch.from_numpy(mask)).numpy()
    return float(np.abs(embed(session(model_bytes), ids, mask) - want).max())


def centroid_accuracy(model_bytes: bytes, data: StatusSplits) -> float:
    """Nearest class centroid (centroids of the training embeddings) on validation, embeddings by onnxruntime."""
    sess = session(model_bytes)
    train = embed(sess, data.input_ids["train"], data.attention_mask["train"])
    val = embed(sess, data.input_ids["val"], data.attention_mask["val"])
    pred = NearestCentroid().fit(train, data.classes["train"]).predict(val)
    return float(accuracy_score(data.classes["val"], pred))


def check_graph(proto: onnx.ModelProto) -> None:
    """Refuse an export whose interface is not the documented one."""
    names = ([i.name for i in proto.graph.input], [o.name for o in proto.graph.output])
    if names != (list(INPUTS), [OUTPUT]):
        raise RuntimeError(f"status encoder exported with inputs/outputs {names}")
