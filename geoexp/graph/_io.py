"""The graph's arrays in and out: undirected pairs to symmetric CSR, and the .npz file."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse as sp

from geoexp._atomic import atomic_path
from geoexp.errors import InputError

FORMAT_VERSION = 1


def pairs_to_csr(n: int, pairs: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Symmetric CSR arrays (indptr int64, indices int32, distances float64) from undirected pairs.

    ``pairs`` is a list ``[first, second, distance]`` that is emptied here, so
    the caller's copies are released as soon as they are no longer needed (the
    pairs are the largest arrays in play). The pairs must be distinct and have
    ``first != second``; callers check that.
    """
    first, second, distance = pairs
    pairs.clear()
    rows = np.concatenate([first, second]).astype(np.int32, copy=False)
    cols = np.concatenate([second, first]).astype(np.int32, copy=False)
    del first, second
    data = np.concatenate([distance, distance]).astype(np.float64, copy=False)
    del distance
    # COO -> CSR is a counting sort in C, linear in the number of pairs; it keeps
    # explicit zeros, which are real distances here (touching units).
    mat = sp.csr_array(sp.coo_array((data, (rows, cols)), shape=(n, n)))
    del rows, cols, data
    mat.sort_indices()
    return (
        mat.indptr.astype(np.int64, copy=False),
        mat.indices.astype(np.int32, copy=False),
        mat.data.astype(np.float64, copy=False),
    )


def ids_to_array(ids: pd.Index, path: object) -> np.ndarray:
    """Ids as an int64, float64 or unicode array that np.load can read without pickle."""
    values = ids.to_numpy()
    if values.dtype.kind in "iub":
        if values.dtype.kind == "u" and values.size and values.max() > np.iinfo(np.int64).max:
            raise InputError(f"cannot save {path}: unit ids exceed the int64 range")
        return values.astype(np.int64)
    if values.dtype.kind == "f":
        return values.astype(np.float64)
    if all(isinstance(v, str) for v in values):
        return values.astype(str) if values.size else np.empty(0, dtype="U1")
    bad = [v for v in values if not isinstance(v, str)]
    raise InputError(
        f"cannot save {path}: unit ids must be all integers or all strings; "
        f"found {len(bad)} of another type, e.g. {bad[:3]!r}"
    )


def save_npz(
    path: str | os.PathLike[str],
    ids: pd.Index,
    indptr: np.ndarray,
    indices: np.ndarray,
    distances: np.ndarray,
    meta: dict,
) -> None:
    """Write the graph to ``path`` (.npz) atomically, without pickled objects."""
    id_values = ids_to_array(ids, path)
    meta = dict(meta, format_version=FORMAT_VERSION, id_name=ids.name)
    with atomic_path(path) as tmp, open(tmp, "wb") as handle:
        # A file handle, not a name: np.savez would append ".npz" to a name.
        np.savez(
            handle,
            ids=id_values,
            indptr=indptr,
            indices=indices,
            distances=distances,
            meta=np.array(json.dumps(meta)),
        )


def load_npz(path: str | os.PathLike[str]) -> tuple[pd.Index, dict, dict]:
    """Read a graph file; return ids, the arrays and the metadata."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"no exposure graph file at {path}")
    try:
        with np.load(path, allow_pickle=False) as archive:
            arrays = {k: archive[k] for k in ("ids", "indptr", "indices", "distances")}
            meta = json.loads(str(archive["meta"]))
    except (KeyError, ValueError, OSError) as err:
        raise InputError(f"{path} is not an exposure graph file written by geoexp: {err}") from err
    if meta.get("format_version") != FORMAT_VERSION:
        raise InputError(
            f"{path} has exposure graph format version {meta.get('format_version')!r}; "
            f"this geoexp reads version {FORMAT_VERSION}"
        )
    ids = pd.Index(arrays.pop("ids"), name=meta.get("id_name"))
    if ids.dtype.kind == "U":
        ids = pd.Index(ids.astype(object), name=meta.get("id_name"))
    return ids, arrays, meta
