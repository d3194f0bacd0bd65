"""Model state to bytes and back, never with pickle.

Layout::

    b"MXRSTATE"            8 bytes, magic
    format version         2 bytes, little-endian unsigned
    sha256 of the payload  32 bytes
    payload                an uncompressed .npz archive: a JSON header (as uint8) plus arrays

Version 2 adds the stable group ids, the next id and the group lifecycle's evidence
(mixture.novelty); the number of groups is then that of the arrays, not the configuration's
starting count. Version 3 adds the labelled documents (mixture.labelled; arrays ``lab.*``) and
``log_forgetting``. Versions 1 and 2 are still read: version 1 groups get the ids 0..K-1, and
both start with no labelled documents and ``log_forgetting`` 0.

Loading checks the magic, the version and the checksum before it parses anything, and parses
with ``np.load(..., allow_pickle=False)``, so bytes from a tampered store cannot run code. Any
defect is a StateFormatError that says what is wrong.
"""

from __future__ import annotations

import functools
import hashlib
import io
import json
import struct
import zipfile
import zlib
from typing import Any

import numpy as np
import scipy.sparse as sp
from numpy.lib import format as npformat

from mixture.config import MixtureConfig
from mixture.errors import ConfigError, StateFormatError
from mixture.labelled import LabelledSet
from mixture.novelty import GroupEvidence
from mixture.stats import MixtureState
from mixture.vocabulary import Vocabulary

MAGIC = b"MXRSTATE"
FORMAT_VERSION = 3
_READABLE_VERSIONS = (1, 2, 3)
_PREFIX = struct.Struct("<8sH32s")


def checksum(data: bytes) -> str:
    """Hex SHA-256 of bytes (used for snapshots' metadata)."""
    return hashlib.sha256(data).hexdigest()


def state_to_bytes(state: MixtureState) -> bytes:
    """Serialise a state: header, arrays, checksum.

    Only the rows in use are written (not the growth reserve).
    """
    header: dict[str, Any] = {
        "format": "mixroute-state",
        "config": state.config.to_dict(),
        "running_scale": state.running_scale,
        "weight_square_sum": state.weight_square_sum,
        "step": state.step,
        "documents_learned": state.documents_learned,
        "warmed_up": state.warmed_up,
        "seed": state.seed,
        "watermark": state.watermark,
        "metadata": state.metadata,
        "next_group_id": state.next_group_id,
        "log_forgetting": state.log_forgetting,
    }
    arrays: dict[str, np.ndarray] = {
        "unscaled_word": np.ascontiguousarray(state.unscaled_word[: state.capacity]),
        "unscaled_docs": state.unscaled_docs,
        "unscaled_total": state.unscaled_total,
    }
    for name, value in state.vocabulary.to_arrays().items():
        arrays[f"vocab.{name}"] = value
    assert state.group_ids is not None
    arrays["group_ids"] = state.group_ids.astype(np.int64)
    if state.evidence is not None:
        for name, value in state.evidence.to_arrays().items():
            arrays[f"life.{name}"] = value
    if len(state.labelled):
        for name, value in state.labelled.to_arrays().items():
            arrays[f"lab.{name}"] = value
    if state.pending is not None:
        pending = sp.csr_matrix(state.pending)
        arrays["pending.data"] = pending.data
        arrays["pending.indices"] = pending.indices.astype(np.int64)
        arrays["pending.indptr"] = pending.indptr.astype(np.int64)
        arrays["pending.shape"] = np.asarray(pending.shape, dtype=np.int64)
    if state.provisional is not None:  # a whole state of its own (never nested further)
        arrays["provisional"] = np.frombuffer(state_to_bytes(state.provisional), dtype=np.uint8)
    arrays["header"] = np.frombuffer(json.dumps(header).encode("utf-8"), dtype=np.uint8)
    payload = npz_bytes(arrays)
    digest = hashlib.sha256(payload).digest()
    return _PREFIX.pack(MAGIC, FORMAT_VERSION, digest) + payload


# Zip records of an uncompressed archive (PKWARE APPNOTE 4.3.7, 4.3.12, 4.3.16), as np.savez
# writes them less the ZIP64 extras, which only members or archives over 4 GiB need.
_ZIP_LOCAL = struct.Struct("<IHHHHHIIIHH")
_ZIP_CENTRAL = struct.Struct("<IHHHHHHIIIHHHHHII")
_ZIP_END = struct.Struct("<IHHHHIIH")
_ZIP_DOS_DATE = (1 << 5) | 1  # 1980-01-01 00:00, the earliest a zip can say: no clock in the bytes
_ZIP_LIMIT = 0xFFFFFFFF


def npz_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    """The uncompressed .npz archive of ``arrays`` that ``np.load`` reads (no pickle).

    The same members as ``np.savez(buffer, allow_pickle=False, **arrays)``: one ``NAME.npy``
    per array, in order, with numpy's own .npy headers. np.savez costs about 30 us a member
    in zipfile's per-member machinery (a state with the lifecycle's evidence has 26 members,
    most of them a few numbers); here the zip records are packed directly and each array's
    data is passed on without a copy. Archives that need ZIP64 (over 4 GiB or 65,535
    members) are left to np.savez.

    Parameters
    ----------
    arrays : dict of str to ndarray
        No object arrays (ValueError, as np.savez without pickle).

    Returns
    -------
    bytes
    """
    parts: list[bytes | memoryview] = []
    central: list[bytes] = []
    offset = 0
    for key, value in arrays.items():
        name = f"{key}.npy".encode()
        header, data = _npy_parts(np.asanyarray(value))
        size = len(header) + data.nbytes
        if size > _ZIP_LIMIT or offset > _ZIP_LIMIT - size or len(arrays) > 0xFFFF:
            return _savez_bytes(arrays)
        crc = zlib.crc32(data, zlib.crc32(header))
        fixed = (20, 0, 0, 0, _ZIP_DOS_DATE, crc, size, size, len(name))
        parts += [_ZIP_LOCAL.pack(0x04034B50, *fixed, 0), name, header, data]
        central += [_ZIP_CENTRAL.pack(0x02014B50, 20, *fixed, 0, 0, 0, 0, 0, offset), name]
        offset += _ZIP_LOCAL.size + len(name) + size
    directory = b"".join(central)
    if offset + len(directory) > _ZIP_LIMIT:
        return _savez_bytes(arrays)
    count = len(arrays)
    end = _ZIP_END.pack(0x06054B50, 0, 0, count, count, len(directory), offset, 0)
    return b"".join([*parts, directory, end])


def _savez_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, allow_pickle=False, **arrays)
    return buffer.getvalue()


def _npy_parts(array: np.ndarray) -> tuple[bytes, memoryview]:
    """A .npy file as its header and its data (a view of the array's memory when contiguous),
    laid out as ``np.lib.format.write_array`` writes them."""
    if array.dtype.hasobject:
        raise ValueError("object arrays cannot be saved when allow_pickle=False")
    fortran = bool(array.flags.f_contiguous and not array.flags.c_contiguous)
    if not (fortran or array.flags.c_contiguous):
        array = np.ascontiguousarray(array)
    header = _npy_header(array.dtype, fortran, array.shape)
    if not array.size:
        return header, memoryview(b"")
    try:
        return header, memoryview(array.T if fortran else array).cast("B")
    except (TypeError, ValueError, BufferError):  # a dtype the buffer protocol cannot show
        return header, memoryview(array.tobytes(order="F" if fortran else "C"))


@functools.lru_cache(maxsize=1024)
def _npy_header(dtype: np.dtype, fortran: bool, shape: tuple[int, ...]) -> bytes:
    """numpy's .npy header for an array (version 1.0, or 2.0 when that cannot hold it); cached,
    since a state's arrays keep their dtypes and mostly their shapes between checkpoints."""
    described = {"descr": npformat.dtype_to_descr(dtype), "fortran_order": fortran, "shape": shape}
    buffer = io.BytesIO()
    try:
        npformat.write_array_header_1_0(buffer, described)
    except ValueError:
        buffer = io.BytesIO()
        npformat.write_array_header_2_0(buffer, described)
    return buffer.getvalue()


def state_from_bytes(data: bytes) -> MixtureState:
    """Load a state written by :func:`state_to_bytes`.

    Raises
    ------
    StateFormatError
        On foreign bytes, an unsupported version, a checksum mismatch or a malformed archive.
    """
    if not isinstance(data, bytes | bytearray | memoryview):
        raise StateFormatError(f"state must be bytes, got {type(data).__name__}")
    data = bytes(data)
    if len(data) < _PREFIX.size:
        raise StateFormatError(f"state is truncated: {len(data)} bytes is shorter than a header")
    magic, version, digest = _PREFIX.unpack_from(data)
    if magic != MAGIC:
        raise StateFormatError("not a mixroute state (wrong magic bytes)")
    if version not in _READABLE_VERSIONS:
        raise StateFormatError(
            f"state format version {version} is not supported "
            f"(this build reads {', '.join(map(str, _READABLE_VERSIONS))})"
        )
    payload = data[_PREFIX.size :]
    if hashlib.sha256(payload).digest() != digest:
        raise StateFormatError("state checksum mismatch: the bytes are corrupt or were altered")
    try:
        with np.load(io.BytesIO(payload), allow_pickle=False) as archive:
            arrays = {name: archive[name] for name in archive.files}
        header = json.loads(arrays.pop("header").tobytes().decode("utf-8"))
    except (ValueError, OSError, KeyError, zipfile.BadZipFile, UnicodeDecodeError) as exc:
        raise StateFormatError(f"state archive is malformed: {exc}") from exc
    try:
        return _build(header, arrays, version)
    except (KeyError, TypeError, ValueError, IndexError, ConfigError) as exc:
        if isinstance(exc, StateFormatError):
            raise
        raise StateFormatError(f"state content is inconsistent: {exc}") from exc


def _build(header: dict[str, Any], arrays: dict[str, np.ndarray], version: int) -> MixtureState:
    if header.get("format") != "mixroute-state":
        raise StateFormatError("state header does not describe a mixroute state")
    config = MixtureConfig.from_dict(header["config"])
    vocab_arrays = {k[len("vocab.") :]: v for k, v in arrays.items() if k.startswith("vocab.")}
    vocabulary = Vocabulary.from_arrays(vocab_arrays)
    word = np.array(arrays["unscaled_word"], dtype=np.float64)
    # Version 1 had a fixed number of groups; from version 2 on the ids say how many there are.
    group_ids = (
        np.arange(config.n_groups, dtype=np.int64)
        if version == 1
        else np.array(arrays["group_ids"], dtype=np.int64)
    )
    k = int(group_ids.shape[0])
    next_group_id = k if version == 1 else int(header["next_group_id"])
    if group_ids.ndim != 1 or k == 0 or np.unique(group_ids).size != k:
        raise StateFormatError("group ids must be distinct, one per group")
    if group_ids.min() < 0 or next_group_id <= int(group_ids.max()):
        raise StateFormatError("group ids must be >= 0 and below the next id to give")
    if word.shape != (vocabulary.capacity, k):
        raise StateFormatError(
            f"word statistics have shape {word.shape}, expected ({vocabulary.capacity}, {k})"
        )
    docs = np.array(arrays["unscaled_docs"], dtype=np.float64)
    total = np.array(arrays["unscaled_total"], dtype=np.float64)
    if docs.shape != (k,) or total.shape != (k,):
        raise StateFormatError("document statistics do not match the number of groups")
    for name, arr in (("word", word), ("docs", docs), ("total", total)):
        if not np.all(np.isfinite(arr)):
            raise StateFormatError(f"{name} statistics hold non-finite values")
    pending = None
    if "pending.data" in arrays:
        shape = tuple(int(x) for x in arrays["pending.shape"])
        pending = sp.csr_matrix(
            (arrays["pending.data"], arrays["pending.indices"], arrays["pending.indptr"]),
            shape=shape,
        )
    state = MixtureState(
        config=config,
        vocabulary=vocabulary,
        unscaled_word=word,
        unscaled_docs=docs,
        unscaled_total=total,
        running_scale=float(header["running_scale"]),
        weight_square_sum=float(header["weight_square_sum"]),
        step=float(header["step"]),
        documents_learned=int(header["documents_learned"]),
        warmed_up=bool(header["warmed_up"]),
        seed=int(header["seed"]),
        watermark=str(header["watermark"]),
        metadata=dict(header["metadata"]),
        pending=pending,
        group_ids=group_ids,
        next_group_id=next_group_id,
    )
    lab = {k[len("lab.") :]: v for k, v in arrays.items() if k.startswith("lab.")}
    if lab:
        state.labelled = LabelledSet.from_arrays(lab)
        state.labelled.counts_matrix(vocabulary.capacity)  # word ids beyond it: InputError
    state.log_forgetting = float(header.get("log_forgetting", 0.0))
    if not (np.isfinite(state.log_forgetting) and state.log_forgetting <= 0.0):
        raise StateFormatError("log_forgetting must be finite and <= 0")
    life = {k[len("life.") :]: v for k, v in arrays.items() if k.startswith("life.")}
    if life:
        state.evidence = GroupEvidence.from_arrays(life, k)
    if not (state.running_scale > 0 and state.weight_square_sum > 0):
        raise StateFormatError("state scale factors must be positive")
    if "provisional" in arrays:
        provisional = state_from_bytes(arrays["provisional"].tobytes())
        if not provisional.warmed_up or provisional.provisional is not None:
            raise StateFormatError("a provisional fit must be a fitted state of its own")
        state.provisional = provisional
    return state
