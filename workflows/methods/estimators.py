"""Fitted scikit-learn estimators stored as bytes in a step's model: skops archives (no pickle) made
deterministic, so the same fitted estimator always gives the same bytes, and so the same model hash and
step key whichever process or executor fitted it."""
from __future__ import annotations

import io
import json
import zipfile
from typing import Any

from swathmill.errors import SwathmillError

__all__ = ["deterministic_archive", "EstimatorStorageError"]


class EstimatorStorageError(SwathmillError, ValueError):
    """A serialised estimator is not the archive expected."""


def deterministic_archive(data: bytes, what: str = "model") -> bytes:
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
            raise EstimatorStorageError(f"unexpected member {name!r} in the serialised {what}")
        files[f"{ids[int(name[:-4])]}.npy"] = src.read(name)
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", compression=zipfile.ZIP_DEFLATED) as dst:
        for name in sorted(files):
            info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            dst.writestr(info, files[name])
    return out.getvalue()
