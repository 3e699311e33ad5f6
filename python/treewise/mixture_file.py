"""The mixture file: a TreeMixture as bytes in treewise's own checked layout (no pickle)."""

from __future__ import annotations

import math
import struct
import zlib
from typing import TYPE_CHECKING

import numpy as np

from treewise import _core
from treewise.errors import CorruptModelError
from treewise.estimator import DependencyTree

if TYPE_CHECKING:
    from treewise.mixture import TreeMixture

__all__ = ["MAGIC", "VERSION", "mixture_from_bytes", "mixture_to_bytes"]

#: The first bytes of every mixture file.
MAGIC = b"TREEWISE-MIXTURE"
#: The layout version this code writes and reads.
VERSION = 1
#: Limits a file must respect before anything is allocated from its numbers.
MAX_COMPONENTS = 1024
MAX_ITERATIONS = 1_000_000


def mixture_to_bytes(model: TreeMixture) -> bytes:
    """The file's bytes (docs/model-format.md, "Mixture files")."""
    tree_bytes = model.single_tree_._fitted().to_bytes()
    comps = model._fitted()
    d = int(model.n_features_in_)
    bounds = [float(b) for b in model.lower_bounds_]
    parts = [
        MAGIC,
        struct.pack("<I", VERSION),
        struct.pack("<Q", len(tree_bytes)),
        tree_bytes,
        struct.pack("<IId", len(comps), d, float(model._fitted_alpha)),
        struct.pack(
            "<QIBf",
            int(model.n_rows_),
            int(model.n_iter_),
            int(model.converged_),
            float(model._fitted_pooling),
        ),
        struct.pack("<I", int(model.n_reseeds_)),
        struct.pack("<I", len(bounds)),
        np.asarray(bounds, dtype="<f8").tobytes(),
        np.asarray(model.weights_, dtype="<f8").tobytes(),
    ]
    for comp in comps:
        parts.append(struct.pack("<I", comp.root))
        parts.append(np.asarray(comp.parent, dtype="<i8").tobytes())
        parts.append(np.asarray(comp.pair_mi, dtype="<f8").tobytes())
        parts.extend(comp.counts(c) for c in range(d))
    body = b"".join(parts)
    return body + struct.pack("<I", zlib.crc32(body))


class _Reader:
    """Reads fields in order; running past the end is a CorruptModelError."""

    def __init__(self, data: bytes, offset: int) -> None:
        self.data = data
        self.offset = offset

    def take(self, size: int) -> bytes:
        if size < 0 or self.offset + size > len(self.data):
            raise CorruptModelError("the mixture file is truncated or damaged")
        out = self.data[self.offset : self.offset + size]
        self.offset += size
        return out

    def unpack(self, fmt: str) -> tuple[int | float, ...]:
        return struct.unpack(fmt, self.take(struct.calcsize(fmt)))

    def floats(self, count: int) -> np.ndarray:
        return np.frombuffer(self.take(8 * count), dtype="<f8")


def mixture_from_bytes(data: bytes, cls: type[TreeMixture]) -> TreeMixture:
    """A fitted mixture from a file's bytes, every field checked before use."""
    if len(data) < len(MAGIC) + 8 or not data.startswith(MAGIC):
        raise CorruptModelError("not a treewise mixture file (wrong first bytes)")
    body, (crc,) = data[:-4], struct.unpack("<I", data[-4:])
    if zlib.crc32(body) != crc:
        raise CorruptModelError("the mixture file is damaged (checksum mismatch)")
    r = _Reader(body, len(MAGIC))
    (version,) = r.unpack("<I")
    if version != VERSION:
        raise CorruptModelError(f"mixture file version {version}; this treewise reads {VERSION}")
    (tree_len,) = r.unpack("<Q")
    tree = DependencyTree._from_bytes(r.take(int(tree_len)))
    k, d, alpha = r.unpack("<IId")
    k, d, alpha = int(k), int(d), float(alpha)
    cards = list(tree.codebook_.cardinalities)
    if not 1 <= k <= MAX_COMPONENTS or d != len(cards):
        raise CorruptModelError(f"the mixture file holds {k} components over {d} columns")
    if not (math.isfinite(alpha) and alpha >= 0):
        raise CorruptModelError("the mixture file's smoothing is not a number >= 0")
    n_rows, n_iter, converged, pooling = r.unpack("<QIBf")
    # The pooling the tables were fitted with (0 in files written before it had a field): a
    # record of the parameter, since the stored counts already hold its pseudo-counts.
    if not (math.isfinite(pooling) and pooling >= 0):
        raise CorruptModelError("the mixture file's pooling is not a number >= 0")
    (n_reseeds,) = r.unpack("<I")
    (n_bounds,) = r.unpack("<I")
    if not 1 <= int(n_bounds) <= MAX_ITERATIONS or int(n_iter) != int(n_bounds):
        raise CorruptModelError("the mixture file's iteration record is inconsistent")
    bounds = r.floats(int(n_bounds))
    weights = r.floats(k).copy()
    if not (np.isfinite(weights).all() and (weights >= 0).all()) or abs(weights.sum() - 1) > 1e-9:
        raise CorruptModelError("the mixture file's weights are not a distribution")
    comps = []
    for _ in range(k):
        (root,) = r.unpack("<I")
        parent = np.frombuffer(r.take(8 * d), dtype="<i8")
        if ((parent < -1) | (parent >= d)).any():
            raise CorruptModelError("a mixture component's parent link points outside")
        pair_mi = r.floats(d * (d - 1) // 2)
        counts = []
        for c in range(d):
            rows = 1 if parent[c] < 0 else cards[int(parent[c])]
            counts.append(r.take(8 * rows * cards[c]))
        comps.append(
            _core.MixtureComponent.from_counts(
                cards, int(root), [int(p) for p in parent], counts, pair_mi.tolist(), alpha
            )
        )
    if r.offset != len(body):
        raise CorruptModelError("the mixture file has bytes after its last component")
    names = [str(n) for n in tree.feature_names_in_]
    # alpha and pooling: the ones fitted with.
    model = cls(n_components=k, alpha=alpha, pooling=float(pooling), columns=names)
    model._restore(tree, comps, weights, [float(b) for b in bounds], bool(converged))
    model.n_rows_ = int(n_rows)
    model.n_reseeds_ = int(n_reseeds)
    return model
