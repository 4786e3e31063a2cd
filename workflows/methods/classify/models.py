"""Storage of fitted SVM models: skops bytes written deterministically, loaded only with trusted types.

The fitted estimators are serialised with skops (no pickle): loading checks every type the bytes name
against the types skops trusts by default plus an explicit allow-list (:data:`SKOPS_EXTRA_TRUSTED`),
and refuses anything else. The bytes are written deterministically (node ids renumbered, members
sorted, fixed zip timestamps) and their SHA-256 is in the model, which the engine hashes into the step
key; loading checks it.
"""
from __future__ import annotations

import hashlib
import io
import json
import zipfile
from collections import OrderedDict
from typing import Any, Mapping

import numpy as np

from .shared import ClassifyError

__all__ = ["SKOPS_EXTRA_TRUSTED", "dump_estimators", "load_svm"]

SKOPS_EXTRA_TRUSTED = (
    "sklearn.calibration._CalibratedClassifier",
    "sklearn.calibration._SigmoidCalibration",
)


def _deterministic_zip(data: bytes) -> bytes:
    """Rewrite a skops archive so that the same model always gives the same bytes.

    skops names nodes and array files after Python object ids (memory addresses), which change from
    run to run. They are renumbered 1, 2, ... in order of first appearance in the schema (the same id
    keeps the same number, so shared objects stay shared), members are sorted and timestamps fixed.
    """
    src = zipfile.ZipFile(io.BytesIO(data))
    schema = json.loads(src.read("schema.json"))
    ids: dict[int, int] = {}

    def walk(node: Any) -> Any:
        if isinstance(node, dict):
            out = {}
            for k, v in node.items():
                if k == "__id__" and isinstance(v, int):
                    out[k] = ids.setdefault(v, len(ids) + 1)
                else:
                    out[k] = walk(v)
            if isinstance(out.get("file"), str) and out["file"].endswith(".npy"):
                old = int(out["file"][:-4])
                out["file"] = f"{ids.setdefault(old, len(ids) + 1)}.npy"
            return out
        if isinstance(node, list):
            return [walk(v) for v in node]
        return node

    files: dict[str, bytes] = {"schema.json": json.dumps(walk(schema), indent=2).encode()}
    for name in src.namelist():
        if name == "schema.json":
            continue
        if not name.endswith(".npy") or not name[:-4].isdigit() or int(name[:-4]) not in ids:
            raise ClassifyError(f"unexpected member {name!r} in the serialised SVM model")
        files[f"{ids[int(name[:-4])]}.npy"] = src.read(name)
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", compression=zipfile.ZIP_DEFLATED) as dst:
        for name in sorted(files):
            info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            dst.writestr(info, files[name])
    return out.getvalue()


def dump_estimators(classifier: Any, probability: Any | None) -> dict:
    """The model entries of fitted estimators: ``skops`` (uint8 bytes) and their ``sha256``."""
    import skops.io as sio

    raw = _deterministic_zip(sio.dumps({"classifier": classifier, "probability": probability}))
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
