"""Safe model files: ``model.json`` (metadata, digests) beside ``weights.npz`` (arrays only).

No pickle anywhere: arrays are loaded with ``allow_pickle=False``, and every file is checked
against a SHA-256 recorded in ``model.json`` before it is read. ``model.json`` carries a
digest of its own content too, so an edited temperature or class list is refused as well.
Each failed check raises ``ModelFileError`` naming the check.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import shutil
import tempfile
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from cascade.errors import ModelFileError

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "META_FILE",
    "ModelFileMixin",
    "WEIGHTS_FILE",
    "data_digest",
    "load_model_dir",
    "save_model_dir",
]

FORMAT_NAME = "cascade-model"
FORMAT_VERSION = 1
META_FILE = "model.json"
WEIGHTS_FILE = "weights.npz"


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _content_digest(meta: dict[str, Any]) -> str:
    body = {k: v for k, v in meta.items() if k != "content_sha256"}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


def save_model_dir(
    path: str | Path, kind: str, meta: dict[str, Any], arrays: dict[str, np.ndarray]
) -> Path:
    """Write a model directory atomically: a crash never leaves a half-written model."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{target.name}.", dir=target.parent))
    # mkdtemp makes the folder 0700; a model directory gets the mode the umask gives any
    # new folder, so a service running as another user can read it where policy allows
    staging.chmod(0o777 & ~_umask())
    try:
        weights = staging / WEIGHTS_FILE
        np.savez_compressed(weights, **arrays)
        full = {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "kind": kind,
            **meta,
            "files": {
                WEIGHTS_FILE: {"sha256": _sha256_file(weights), "bytes": weights.stat().st_size}
            },
        }
        full["content_sha256"] = _content_digest(full)
        (staging / META_FILE).write_text(json.dumps(full, indent=2, sort_keys=False) + "\n",
                                         encoding="utf-8")
        if target.exists():
            if not (target / META_FILE).exists() and any(target.iterdir()):
                raise ModelFileError(
                    f"{target} exists and is not a model directory; refusing to overwrite it"
                )
            old = target.with_name(f".{target.name}.old")
            shutil.rmtree(old, ignore_errors=True)
            os.replace(target, old)
            os.replace(staging, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(staging, target)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return target


def load_model_dir(path: str | Path, kind: str) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Read and verify a model directory; return ``(meta, arrays)``."""
    root = Path(path)
    meta_path = root / META_FILE
    if not root.is_dir():
        raise ModelFileError(f"{root} is not a model directory (no such directory)")
    if not meta_path.is_file():
        raise ModelFileError(f"{root} has no {META_FILE}: not a cascade model directory")
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelFileError(f"{meta_path} is not valid JSON (truncated or foreign): {exc}") \
            from None
    if not isinstance(meta, dict) or meta.get("format") != FORMAT_NAME:
        raise ModelFileError(f"{meta_path} is not a cascade model file (foreign format)")
    version = meta.get("format_version")
    if version != FORMAT_VERSION:
        raise ModelFileError(
            f"{meta_path} has format version {version!r}; this cascade reads version "
            f"{FORMAT_VERSION}. Retrain the model with this version, or use the cascade "
            "release that wrote it."
        )
    if meta.get("content_sha256") != _content_digest(meta):
        raise ModelFileError(
            f"{meta_path} content digest does not match: the metadata was edited or corrupted"
        )
    if meta.get("kind") != kind:
        raise ModelFileError(f"{root} holds a {meta.get('kind')!r} model, not a {kind!r} model")
    entry = meta.get("files", {}).get(WEIGHTS_FILE)
    weights_path = root / WEIGHTS_FILE
    if not isinstance(entry, dict) or "sha256" not in entry:
        raise ModelFileError(f"{meta_path} records no digest for {WEIGHTS_FILE}")
    if not weights_path.is_file():
        raise ModelFileError(f"{root} has no {WEIGHTS_FILE}")
    size = weights_path.stat().st_size
    if size != entry.get("bytes"):
        raise ModelFileError(
            f"{WEIGHTS_FILE} is {size} bytes but model.json records {entry.get('bytes')}: "
            "truncated or replaced"
        )
    blob = weights_path.read_bytes()
    if hashlib.sha256(blob).hexdigest() != entry["sha256"]:
        raise ModelFileError(f"{WEIGHTS_FILE} digest does not match model.json: tampered or "
                             "corrupted")
    try:
        with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
            arrays = {name: npz[name] for name in npz.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as exc:
        raise ModelFileError(f"{WEIGHTS_FILE} cannot be read as numpy arrays: {exc}") from None
    return meta, arrays


def data_digest(items: list[str], labels: list[str]) -> str:
    """SHA-256 of the training rows, recorded so a model can be traced to its data."""
    digest = hashlib.sha256()
    for item, label in zip(items, labels, strict=True):
        digest.update(item.encode("utf-8", "surrogatepass"))
        digest.update(b"\t")
        digest.update(str(label).encode("utf-8"))
        digest.update(b"\n")
    return digest.hexdigest()


def _to_json(value: Any) -> Any:
    """Parameter values as JSON keeps them (tuples become lists)."""
    if isinstance(value, tuple | list):
        return [_to_json(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _to_json(v) for k, v in value.items()}
    return value


def _from_json(cls: type, params: dict[str, Any]) -> dict[str, Any]:
    """Lists back to tuples where the constructor's default is a tuple."""
    import inspect

    if not isinstance(params, dict):
        raise TypeError("params is not a mapping")
    defaults = {name: p.default for name, p in inspect.signature(cls.__init__).parameters.items()}
    out = {}
    for name, value in params.items():
        if isinstance(defaults.get(name), tuple) and isinstance(value, list):
            value = tuple(value)
        out[name] = value
    return out


class ModelFileMixin:
    """``save``/``load`` for every fitted class, in the one safe format of this module.

    A subclass names its ``_model_kind`` (checked on load, so a page model is never read as
    a URL model) and ``_version_prefix``, and supplies ``_file_state()`` (extra metadata and
    the arrays to store) and ``_restore_state(meta, arrays, where)``. Constructor parameters
    are stored as ``params`` and given back to the constructor on load, so a loaded model has
    the parameters it was fitted with. ``links`` names the versions of the models this one
    was fitted beside (fusion, fetch-value model); after ``load`` they are in ``links_``.
    """

    _model_kind: str = ""
    _version_prefix: str = ""

    def _file_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        raise NotImplementedError

    def _restore_state(self, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                       where: str) -> None:
        raise NotImplementedError

    def _check_fitted(self) -> None:
        raise NotImplementedError

    @property
    def version(self) -> str:
        """``<prefix>-`` and the first 12 hex digits of the saved file's content digest."""
        return getattr(self, "version_", f"{self._version_prefix}-unsaved")

    def save(self, path: str | Path, metrics: dict[str, Any] | None = None,
             links: dict[str, str] | None = None) -> Path:
        """Write ``model.json`` + ``weights.npz`` to directory ``path`` (atomically)."""
        import time

        from cascade import __version__

        self._check_fitted()
        extra, arrays = self._file_state()
        meta = {"cascade_version": __version__,
                "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "params": _to_json(self.get_params()),  # type: ignore[attr-defined]
                **extra, "links": dict(links or {}), "metrics": metrics or {}}
        target = save_model_dir(path, self._model_kind, meta, arrays)
        written = json.loads((target / META_FILE).read_text(encoding="utf-8"))
        self.version_ = f"{self._version_prefix}-{written['content_sha256'][:12]}"
        self.links_ = dict(links or {})
        self.metrics_ = metrics or {}
        return target

    @classmethod
    def load(cls, path: str | Path) -> Any:
        """Read a model directory, verifying every digest; raises ``ModelFileError``."""
        meta, arrays = load_model_dir(path, cls._model_kind)
        try:
            model = cls(**_from_json(cls, meta["params"]))
            model._check_params()  # type: ignore[attr-defined]
            model._restore_state(meta, arrays, str(path))
            model.training_ = meta.get("training", {})
            model.metrics_ = meta.get("metrics", {})
            model.links_ = {str(a): str(b) for a, b in dict(meta.get("links") or {}).items()}
            model.version_ = f"{cls._version_prefix}-{str(meta['content_sha256'])[:12]}"
        except ModelFileError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
            raise ModelFileError(f"{path}: model.json is missing or has a bad field: {exc}") \
                from None
        return model
