"""Atomic JSON files (tracker.json, check.json): written to a temporary sibling and renamed,
so a reader never sees half a file. Standard library only (the evaluator side may use it)."""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path


def write_json_atomic(path, obj, **dump_kwargs) -> None:
    """json.dump ``obj`` to ``path`` atomically (mode 0644); ``dump_kwargs`` go to json.dump."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(obj, fh, ensure_ascii=False, **dump_kwargs)
            fh.write("\n")
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
