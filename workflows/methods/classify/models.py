"""Storage of fitted SVM models: skops bytes written deterministically, loaded only with trusted types.

The fitted estimators are serialised with skops (no pickle): loading checks every type the bytes name
against the types skops trusts by default plus an explicit allow-list (:data:`SKOPS_EXTRA_TRUSTED`),
and refuses anything else. The bytes are written deterministically (node ids renumbered, members
sorted, fixed zip timestamps) and their SHA-256 is in the model, which the engine hashes into the step
key; loading checks it.
"""
from __future__ import annotations

import hashlib
from collections import OrderedDict
from typing import Any, Mapping

import numpy as np

from swathmill.workflows.methods.estimators import deterministic_archive

from .shared import ClassifyError

__all__ = ["SKOPS_EXTRA_TRUSTED", "dump_estimators", "load_svm"]

SKOPS_EXTRA_TRUSTED = (
    "sklearn.calibration._CalibratedClassifier",
    "sklearn.calibration._SigmoidCalibration",
)


def dump_estimators(classifier: Any, probability: Any | None) -> dict:
    """The model entries of fitted estimators: ``skops`` (uint8 bytes) and their ``sha256``."""
    import skops.io as sio

    raw = deterministic_archive(sio.dumps({"classifier": classifier, "probability": probability}))
    return {"skops": np.frombuffer(raw, dtype=np.uint8).copy(), "sha256": hashlib.sha256(raw).hexdigest()}


_SVM_CACHE: "OrderedDict[str, dict]" = OrderedDict()


def load_svm(model: Mapping[str, Any]) -> dict:
    """The estimators of an SVM model: {"classifier": Pipeline, "probability": calibrated or None}.

    Verifies the SHA-256 and refuses any type outside skops' defaults and :data:`SKOPS_EXTRA_TRUSTED`.
    Cached per process by hash.
    """
    import skops.io as sio

    raw = np.asarray(model["skops"], dtype=np.uint8).tobytes()
    digest = hashlib.sha256(raw).hexdigest()
    if digest != model.get("sha256"):
        raise ClassifyError(f"SVM model bytes do not match their recorded SHA-256 ({model.get('sha256')!r}); "
                            "the model file is corrupt or was altered")
    if digest in _SVM_CACHE:
        _SVM_CACHE.move_to_end(digest)
        return _SVM_CACHE[digest]
    untrusted = sio.get_untrusted_types(data=raw)
    refused = sorted(set(untrusted) - set(SKOPS_EXTRA_TRUSTED))
    if refused:
        raise ClassifyError(f"SVM model names types that are not trusted: {refused}; refusing to load it")
    est = sio.loads(raw, trusted=list(untrusted))
    if not isinstance(est, dict) or "classifier" not in est:
        raise ClassifyError("SVM model does not hold a classifier")
    _SVM_CACHE[digest] = est
    while len(_SVM_CACHE) > 4:
        _SVM_CACHE.popitem(last=False)
    return est
