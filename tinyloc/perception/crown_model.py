"""The crown model: a small linear score telling tree crowns from facades by texture, fitted once.

Above the horizon the classical rules see "not sky, not green" and must still choose between a
building and a tree: bare or dark crowns are neither green nor bluish. Hand-crafted texture and
colour features (``FEATURES``, computed by the segmenter's kernels, formulas in
``_kernels.tensor_shape`` and neighbours) separate them: crowns and branches have fine, isotropic
texture (low orientation coherence, a high share of diagonal gradient energy, much energy lost when
the image is reduced), facades long horizontal and vertical edges, flat colour patches and more
saturated colour. The score is ``z = bias + sum_k w_k (f_k - mean_k) / scale_k`` and the tree
probability ``sig(z)``; the weights are a logistic regression fitted by iteratively reweighted least
squares (Newton's method) on a stated split of labelled frames and stored with their provenance in
``crown_default.json`` beside this module, as the correlator stores its scoring model.

File format (JSON, ours): ``{"format": "tinyloc-crown-model", "version": 1, "features": [names],
"mean": [...], "scale": [...], "weights": [...], "bias": b, "provenance": {...}}``; the feature
names must equal ``FEATURES`` in order, or ``COLOUR_FEATURES`` (``FEATURES`` followed by the colour
and sky-context planes of crown_features.py: the "colour" models); a sky-gap model's are its crown
model's followed by ``GAP_EXTRA``.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from . import _kernels as K
from .crown_features import CONTEXT_FEATURES, EXTRA_FEATURES

FORMAT = "tinyloc-crown-model"
DEFAULT_PATH = Path(__file__).with_name("crown_default.json")

#: Feature planes in kernel order (``_kernels.T_*``); "N" in a name is the box-mean window (pixels of
#: the segmentation raster), "fr" the fine-texture ratio, "en" the gradient energy.
FEATURES = ("v", "s", "exgr", "u", "var9", "coh9", "axis9", "fr", "exgr9", "s9", "v15", "s15", "s31", "coh15",
            "coh31", "axis15", "vert15", "fine15", "fr15", "fr31", "logen9", "en15", "nonsky9")
if len(FEATURES) != K.NT:
    raise RuntimeError("crown model: feature list and kernel planes disagree")
#: The sky-gap model's features: the crown features plus, from the labels after the crown model, the
#: share of tree pixels in 9 x 9 and 15 x 15 windows, the gradient energy ``tex`` and the smoothed crown
#: probability (planes of ``Segmenter.gfeat`` beyond ``tfeat``).
GAP_EXTRA = ("tree9", "tree15", "tex", "crown")
GAP_FEATURES = FEATURES + GAP_EXTRA
GAP_PATH = Path(__file__).with_name("crown_gaps_default.json")
#: The "colour" models: the texture features plus Lab a*, b*, sky context and products with the height
#: above the horizon (crown_features.py).
COLOUR_FEATURES = FEATURES + EXTRA_FEATURES
COLOUR_GAP_FEATURES = COLOUR_FEATURES + GAP_EXTRA
#: The "context" models: a second score on the colour planes plus the layout of the first score's crown
#: map (crown_features.CONTEXT_FEATURES); the file holds the first (colour) model under "first".
CONTEXT_FEATURES_ALL = COLOUR_FEATURES + CONTEXT_FEATURES
#: Feature lists a crown model file may have (the sky-gap model: one of them + GAP_EXTRA).
CROWN_LAYOUTS = (FEATURES, COLOUR_FEATURES, CONTEXT_FEATURES_ALL)
#: Shipped models by name: (crown model file, sky-gap model file).
NAMED = {"default": (DEFAULT_PATH, GAP_PATH),
         "colour": (DEFAULT_PATH.with_name("crown_colour.json"), DEFAULT_PATH.with_name("crown_gaps_colour.json")),
         "context": (DEFAULT_PATH.with_name("crown_context.json"),
                     DEFAULT_PATH.with_name("crown_gaps_context.json"))}


@dataclass(frozen=True)
class CrownModel:
    """Weights of the linear crown score (see the module docstring).

    Attributes
    ----------
    mean, scale, weights : ndarray (NT,) float64
        Standardisation and weights per feature.
    bias : float
    provenance : dict
        Data, split and fit settings the numbers came from.
    features : tuple of str
    first : CrownModel or None
        A "context" model's first score (a colour model, whose smoothed crown map the context planes
        describe); None otherwise.
    """

    mean: np.ndarray
    scale: np.ndarray
    weights: np.ndarray
    bias: float
    provenance: dict = field(default_factory=dict, compare=False)
    features: tuple = FEATURES
    first: "CrownModel | None" = field(default=None, compare=False)

    def __post_init__(self):
        n = len(self.features)
        is_gap = tuple(self.features[-len(GAP_EXTRA):]) == GAP_EXTRA
        ctx = not is_gap and tuple(self.features[len(COLOUR_FEATURES):]) == CONTEXT_FEATURES
        if ctx != (self.first is not None):
            raise InputError("crown model: a context model (features ending in the context planes) needs its "
                             "first model, and only a context model has one")
        if self.first is not None and self.first.features != COLOUR_FEATURES:
            raise InputError("crown model: the first model of a context model must be a colour model")
        for name in ("mean", "scale", "weights"):
            a = np.asarray(getattr(self, name), np.float64)
            if a.shape != (n,) or not np.all(np.isfinite(a)):
                raise InputError(f"crown model: {name} must be {n} finite numbers")
            object.__setattr__(self, name, a)
        if np.any(self.scale <= 0):
            raise InputError("crown model: scales must be > 0")
        if not math.isfinite(self.bias):
            raise InputError("crown model: bias must be finite")

    def folded(self) -> tuple[np.ndarray, float]:
        """(w', b') with the standardisation folded in: z = b' + sum_k w'_k f_k (what the kernel uses)."""
        w = self.weights / self.scale
        return np.ascontiguousarray(w), float(self.bias - np.dot(w, self.mean))

    def score(self, tfeat: np.ndarray) -> np.ndarray:
        """z for feature vectors (..., NT) (plain NumPy; tools and tests)."""
        return self.bias + ((np.asarray(tfeat, np.float64) - self.mean) / self.scale) @ self.weights

    def to_dict(self) -> dict:
        d = {"format": FORMAT, "version": 1, "features": list(self.features), "mean": self.mean.tolist(),
             "scale": self.scale.tolist(), "weights": self.weights.tolist(), "bias": self.bias,
             "provenance": self.provenance}
        if self.first is not None:
            d["first"] = self.first.to_dict()
        return d

    def save(self, path) -> None:
        Path(path).write_text(json.dumps(self.to_dict(), indent=1) + "\n")

    @property
    def n_extra(self) -> int:
        """Feature planes beyond the texture set (``crown_features.EXTRA_FEATURES``) the model needs."""
        n = len(self.features) - len(FEATURES)
        return n - len(GAP_EXTRA) if self.features[-len(GAP_EXTRA):] == GAP_EXTRA else n

    @classmethod
    def load(cls, path, features: tuple | None = None, *, gaps: bool = False) -> "CrownModel":
        """Read a model file. ``features``: the exact feature list required; None: any of ``CROWN_LAYOUTS``
        (with ``gaps``, any of them followed by ``GAP_EXTRA``)."""
        try:
            d = json.loads(Path(path).read_text())
        except OSError as e:
            raise InputError(f"{path}: cannot read the crown model ({e.strerror})") from None
        except json.JSONDecodeError as e:
            raise InputError(f"{path}: not valid JSON (line {e.lineno})") from None
        if not isinstance(d, dict) or d.get("format") != FORMAT or d.get("version") != 1:
            raise InputError(f"{path}: not a {FORMAT} version 1 file")
        allowed = [tuple(features)] if features is not None else \
            [lay + GAP_EXTRA if gaps else lay for lay in CROWN_LAYOUTS]
        got = tuple(d.get("features") or ())
        if got not in allowed:
            names = ("GAP_FEATURES", "COLOUR_GAP_FEATURES", "CONTEXT_FEATURES_ALL + GAP_EXTRA") if gaps else \
                ("FEATURES", "COLOUR_FEATURES", "CONTEXT_FEATURES_ALL")
            want = ", ".join(allowed[0]) if features is not None else \
                " or ".join(f"crown_model.{n} ({len(lay)} names)" for n, lay in zip(names, allowed))
            raise InputError(f"{path}: feature list ({len(got)} names) does not match this build's: {want}")
        features = got
        try:
            first = None
            if "first" in d:
                first = cls._from_dict(d["first"], path)
            return cls(np.array(d["mean"], float), np.array(d["scale"], float), np.array(d["weights"], float),
                       float(d["bias"]), dict(d.get("provenance", {})), tuple(features), first)
        except InputError as e:
            raise InputError(f"{path}: {e}") from None
        except (KeyError, TypeError, ValueError) as e:
            raise InputError(f"{path}: bad crown model: {e}") from None

    @classmethod
    def _from_dict(cls, d, path) -> "CrownModel":
        """A context model's first model (a colour model) from its entry in the file."""
        if not isinstance(d, dict) or tuple(d.get("features") or ()) != COLOUR_FEATURES:
            raise InputError("the first model of a context model must be a colour model")
        return cls(np.array(d["mean"], float), np.array(d["scale"], float), np.array(d["weights"], float),
                   float(d["bias"]), dict(d.get("provenance", {})), COLOUR_FEATURES)


_CACHE: dict[tuple[str, bool], CrownModel] = {}


def load_crown_model(name: str, *, gaps: bool = False, base: tuple | None = None) -> CrownModel | None:
    """A crown or sky-gap model by name or path.

    ``"default"`` / ``"colour"``: the shipped models (``NAMED``; a sky-gap model ``"default"`` with a
    colour crown model ``base`` is the colour one); ``""`` or ``"off"``: None (the bright-mix crown rule,
    or no sky-gap model); else a path. ``gaps`` selects the sky-gap model instead of the crown
    model; ``base``, the crown model's feature list, then requires the sky-gap model's to be ``base +
    GAP_EXTRA`` (both read the same feature planes).
    """
    if name in ("", "off"):
        return None
    if gaps and name == "default" and base is not None and tuple(base) in (COLOUR_FEATURES, CONTEXT_FEATURES_ALL):
        # the shipped sky-gap model that goes with the shipped crown model in use
        name = "colour" if tuple(base) == COLOUR_FEATURES else "context"
    if name in NAMED:
        path = str(NAMED[name][1 if gaps else 0])
    else:
        path = str(Path(name))
    key = (path, gaps)
    if key not in _CACHE:
        _CACHE[key] = CrownModel.load(path, gaps=gaps)
    model = _CACHE[key]
    if gaps and base is not None and model.features != tuple(base) + GAP_EXTRA:
        raise InputError(f"{path}: the sky-gap model's features do not follow the crown model's "
                         f"({len(model.features)} features, expected {len(base) + len(GAP_EXTRA)}); "
                         "fit it with the same crown model")
    return model


def fit_crown_model(x: np.ndarray, is_tree: np.ndarray, sample_weight: np.ndarray | None = None, *,
                    l2: float = 1e-2, iterations: int = 25, provenance: dict | None = None,
                    features: tuple = FEATURES, first: CrownModel | None = None) -> CrownModel:
    """Logistic regression of ``is_tree`` on the features by Newton's method (IRLS), L2-regularised.

    Parameters
    ----------
    x : ndarray (n, len(features))
        Feature vectors (``Segmenter.tfeat`` / ``gfeat`` planes at the sampled pixels).
    is_tree : ndarray (n,) bool
    sample_weight : ndarray (n,), optional
        Per-sample weights (e.g. to balance classes and data sources).
    l2 : float
        Ridge penalty on the standardised weights (not on the bias).
    """
    x = np.asarray(x, np.float64)
    y = np.asarray(is_tree, np.float64)
    nf = len(features)
    if x.ndim != 2 or x.shape[1] != nf or len(y) != len(x) or len(x) < 10:
        raise InputError(f"crown model fit: expected (n, {nf}) features and n labels, got {x.shape}, {y.shape}")
    sw = np.ones(len(y)) if sample_weight is None else np.asarray(sample_weight, np.float64)
    mean = np.average(x, axis=0, weights=sw)
    scale = np.sqrt(np.average((x - mean) ** 2, axis=0, weights=sw)) + 1e-9
    a = np.hstack([(x - mean) / scale, np.ones((len(x), 1))])
    th = np.zeros(a.shape[1])
    reg = l2 * np.eye(a.shape[1])
    reg[-1, -1] = 0.0
    for _ in range(iterations):
        p = 1.0 / (1.0 + np.exp(-np.clip(a @ th, -40, 40)))
        g = a.T @ (sw * (p - y)) + reg @ th
        hess = (a * (sw * p * (1 - p))[:, None]).T @ a + reg + 1e-9 * np.eye(a.shape[1])
        step = np.linalg.solve(hess, g)
        th -= step
        if np.max(np.abs(step)) < 1e-8:
            break
    return CrownModel(mean, scale, th[:-1], float(th[-1]), dict(provenance or {}), tuple(features), first)


__all__ = ["CrownModel", "FEATURES", "GAP_FEATURES", "GAP_EXTRA", "COLOUR_FEATURES", "COLOUR_GAP_FEATURES",
           "CONTEXT_FEATURES_ALL",
           "CROWN_LAYOUTS", "NAMED", "load_crown_model", "fit_crown_model", "DEFAULT_PATH", "GAP_PATH"]
