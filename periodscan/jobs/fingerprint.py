"""What identifies a sweep beyond its config: the data loaded, the user's code, the versions.

A config names a file and a class; it does not say what is in them. Rewriting an ``.npz`` at
the same path, or editing the model class behind the same ``_target_``, would silently mix runs
trained on different things into one table. So a job records a fingerprint the first time it
writes a folder and refuses a later job whose fingerprint differs:

- ``data``: sha256 over the tensors actually loaded (train and held-out, inputs and labels,
  with their shapes and dtypes), whatever loader made them; for streamed data, over the labels
  and the bytes of the files behind the examples (see :meth:`periodscan.data.StreamData.digest`);
- ``code``: sha256 of the source file of every ``_target_`` outside periodscan and torch (the
  user's data, model, deficit, monitor... modules);
- ``versions``: periodscan's and torch's. Both must match exactly: a new release may change
  the numbers, and nothing cheaper than retraining proves it does not.
"""

from __future__ import annotations

import hashlib
import importlib
import inspect
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

#: Targets whose code is covered by the recorded versions instead of a file hash.
VERSIONED = ("periodscan.", "torch.", "torchvision.")


def tensor_digest(*tensors) -> str:
    """sha256 over tensors' dtypes, shapes and bytes (no copy of contiguous CPU tensors)."""
    digest = hashlib.sha256()
    for tensor in tensors:
        array = np.ascontiguousarray(tensor.detach().cpu().numpy())
        digest.update(f"{array.dtype}{array.shape}".encode())
        digest.update(memoryview(array).cast("B"))
    return digest.hexdigest()


def data_digest(data) -> str:
    """Fingerprint of the data as loaded: the tensors of a :class:`periodscan.data.TensorData`;
    for streamed data (:class:`periodscan.data.StreamData`) its own ``digest()``: the labels
    and the bytes of the files behind the examples, re-reading only files whose size, times or
    inode changed (a Dataset that names no files has every input hashed instead).
    """
    if hasattr(data, "digest"):
        return data.digest()
    return tensor_digest(data.x_train, data.y_train, data.x_test, data.y_test)


def user_targets(node: Any, key: str = "") -> Iterator[tuple[str, str]]:
    """(config key, target) for every ``_target_`` in a config block outside periodscan."""
    if isinstance(node, dict):
        target = node.get("_target_")
        if isinstance(target, str) and not target.startswith(VERSIONED):
            yield key, target
        for name, value in node.items():
            yield from user_targets(value, f"{key}.{name}" if key else str(name))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            yield from user_targets(value, f"{key}[{i}]")


def source_file(target: str) -> Path | None:
    """The source file of the module that defines ``target`` (None if it has none)."""
    parts = target.split(".")
    for cut in range(len(parts) - 1, 0, -1):
        try:
            module = importlib.import_module(".".join(parts[:cut]))
        except ImportError:
            continue
        try:
            found = inspect.getsourcefile(module)
        except TypeError:  # a built-in module
            return None
        return Path(found) if found else None
    return None


def code_digests(plain: dict[str, Any], keys: tuple[str, ...]) -> dict[str, dict[str, str]]:
    """Config key -> {target, file, sha256} for the user code the training blocks call."""
    out = {}
    for block in keys:
        for key, target in user_targets(plain.get(block), block):
            path = source_file(target)
            digest = hashlib.sha256(path.read_bytes()).hexdigest() if path else "(no source)"
            out[key] = {"target": target, "file": path.name if path else "", "sha256": digest}
    return out


def versions() -> dict[str, str]:
    import torch

    import periodscan

    return {"periodscan": periodscan.__version__, "torch": torch.__version__}


def fingerprint(plain: dict[str, Any], data, keys: tuple[str, ...]) -> dict[str, Any]:
    """The whole fingerprint of a job (see the module docstring)."""
    return {"data": data_digest(data), "code": code_digests(plain, keys),
            "versions": versions()}


def changes(before: dict[str, Any], after: dict[str, Any]) -> list[str]:
    """What differs between a recorded fingerprint and this job's, one phrase each."""
    out = []
    if before.get("data") != after.get("data"):
        out.append(f"the data loaded differs (sha256 {_short(before.get('data'))} -> "
                   f"{_short(after.get('data'))})")
    old, new = before.get("code") or {}, after.get("code") or {}
    for key in sorted(set(old) | set(new)):
        a, b = old.get(key, {}), new.get(key, {})
        if a.get("sha256") != b.get("sha256"):
            what = key.split(".")[0].split("[")[0]
            out.append(f"{what} code changed: {b.get('target') or a.get('target')} "
                       f"({b.get('file') or a.get('file')}, sha256 {_short(a.get('sha256'))} -> "
                       f"{_short(b.get('sha256'))})")
    for name in sorted(set(before.get("versions") or {}) | set(after.get("versions") or {})):
        a = (before.get("versions") or {}).get(name)
        b = (after.get("versions") or {}).get(name)
        if a != b:
            out.append(f"{name} version changed: {a} -> {b}")
    return out


def _short(digest: Any) -> str:
    return str(digest)[:12] if digest else "(none)"
