"""The place-model file: one versioned ``.npz`` archive, written atomically, read without pickle.

The archive holds a JSON header (format name, version, then what the model
puts there: the environment's dict, the settings, ...) under ``"header"``
and plain arrays under their names. This module owns the container: the
format name and version, the atomic write, and every check on reading, so
that a file that is not a model, of another version, or damaged gives one
:class:`ModelFileError` with a sentence to act on.
:class:`decoder.encoding.place_model.PlaceModel` decides what goes in.
"""

from __future__ import annotations

import json
import os
import zipfile
import zlib
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

#: Name written into every model file's header.
FORMAT_NAME = "placeloop.place_model"

#: Version of the model file layout this module writes and reads.
FORMAT_VERSION = 1

#: First bytes of every zip archive, and so of every ``.npz`` file.
_ZIP_MAGIC = b"PK\x03\x04"

_Model = TypeVar("_Model")


class ModelFileError(ValueError):
    """A model file that cannot be read: not a model, another version, or damaged."""


def _json_default(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"cannot write {type(value).__name__} into a model file header")


def write_model_file(path: str | os.PathLike, header: dict[str, Any], arrays: dict[str, np.ndarray],
                     format_name: str = FORMAT_NAME) -> Path:
    """Write a header and arrays to one ``.npz`` file, replacing it atomically.

    Parameters
    ----------
    path : str or path-like
        Written exactly as given (no suffix is added).
    header : dict
        JSON-friendly entries (numpy scalars and arrays are turned into
        plain numbers and lists); the format name and version go first.
    arrays : dict of str to ndarray
        None of them named ``"header"``.
    format_name : str, default FORMAT_NAME
        The kind of model in the file (another for the mark model).

    Returns
    -------
    Path
        Where the file now is.
    """
    path = Path(path)
    header = {"format": format_name, "version": FORMAT_VERSION, **header}
    arrays = {"header": np.array(json.dumps(header, default=_json_default)), **arrays}
    # Written beside the target and renamed, so that a crash mid-write
    # never leaves a half file under the model's name.
    partial = path.with_name(path.name + ".partial")
    try:
        with open(partial, "wb") as fh:
            np.savez_compressed(fh, **arrays)
        os.replace(partial, path)
    finally:
        partial.unlink(missing_ok=True)
    return path


def read_model_file(
    path: str | os.PathLike, build: Callable[[dict[str, Any], dict[str, np.ndarray]], _Model],
    format_name: str = FORMAT_NAME,
) -> _Model:
    """Read a file written by :func:`write_model_file` and build the model from it.

    Parameters
    ----------
    path : str or path-like
    build : callable
        ``build(header, arrays)`` makes the model; a ValueError, KeyError or
        TypeError it raises means the parts do not fit together, and is
        reported as a damaged file.
    format_name : str, default FORMAT_NAME
        The kind of model the file must hold.

    Returns
    -------
    What ``build`` returns.

    Raises
    ------
    ModelFileError
        If the file is not a place-model file, was written in another
        format version, or is truncated or damaged.
    """
    path = Path(path)
    with open(path, "rb") as fh:
        magic = fh.read(4)
    if magic != _ZIP_MAGIC:
        raise ModelFileError(f"{path} is not a placeloop place-model file (it is not an .npz archive)")
    try:
        with np.load(path, allow_pickle=False) as npz:
            if "header" not in npz.files:
                raise ModelFileError(
                    f"{path} is an .npz archive but not a placeloop place-model file (no header)"
                )
            header = json.loads(str(npz["header"][()]))
            if not isinstance(header, dict) or header.get("format") != format_name:
                raise ModelFileError(f"{path} is an .npz archive but not a placeloop place-model file")
            if header.get("version") != FORMAT_VERSION:
                raise ModelFileError(
                    f"{path} is a place-model file of format version {header.get('version')!r}; "
                    f"this placeloop reads version {FORMAT_VERSION} only"
                )
            arrays = {name: npz[name] for name in npz.files if name != "header"}
        return build(header, arrays)
    except ModelFileError:
        raise
    except (zipfile.BadZipFile, EOFError, zlib.error, OSError, ValueError, KeyError, TypeError) as exc:
        raise ModelFileError(f"{path} is truncated or damaged ({exc}); save the model again") from None
