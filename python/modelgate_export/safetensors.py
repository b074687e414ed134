"""A safetensors writer and reader in plain numpy.

The format (published by its authors as "safetensors"): an unsigned 64-bit
little-endian header length N, N bytes of JSON header, then the tensors'
bytes, C order, little-endian. modelgate stores float32 ("F32").
"""

import json
import struct

import numpy as np


def write(path, tensors, metadata=None):
    """Write [(name, array)] as little-endian float32 tensors, in order."""
    header, chunks, offset = {}, [], 0
    for name, arr in tensors:
        a = np.ascontiguousarray(arr, dtype="<f4")
        if a.ndim not in (1, 2):
            raise ValueError("tensor %r: %d dimensions; modelgate stores vectors and matrices" % (name, a.ndim))
        if not np.all(np.isfinite(a)):
            raise ValueError("tensor %r holds NaN or infinite values (after conversion to float32)" % name)
        b = a.tobytes(order="C")
        header[name] = {"dtype": "F32", "shape": list(a.shape), "data_offsets": [offset, offset + len(b)]}
        chunks.append(b)
        offset += len(b)
    if metadata:
        header["__metadata__"] = {str(k): str(v) for k, v in metadata.items()}
    h = json.dumps(header, separators=(",", ":")).encode("utf-8")
    h += b" " * (-len(h) % 8)  # the tensor data starts 8-byte aligned
    with open(path, "wb") as f:
        f.write(struct.pack("<Q", len(h)))
        f.write(h)
        f.write(b"".join(chunks))


_DTYPES = {"F32": "<f4", "F16": "<f2"}


def read(path):
    """Read a safetensors file into {name: float32 array} (F32 and F16)."""
    with open(path, "rb") as f:
        raw = f.read()
    (n,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8:8 + n])
    base = 8 + n
    out = {}
    for name, t in header.items():
        if name == "__metadata__":
            continue
        if t["dtype"] not in _DTYPES:
            raise ValueError("%s: tensor %r has dtype %s; this reader knows F32 and F16" % (path, name, t["dtype"]))
        a, b = t["data_offsets"]
        out[name] = np.frombuffer(raw[base + a:base + b], dtype=_DTYPES[t["dtype"]]).reshape(t["shape"]).astype(np.float32)
    return out
