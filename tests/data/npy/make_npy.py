"""Reference .npy files for tests/npy_numpy.rs, written by NumPy itself.

Run from the repository root with any Python that has NumPy:

    python tests/data/npy/make_npy.py

It rewrites the *.npy files beside it and expected.json, which holds for each
readable file the shape and the float32 values NumPy's own
`astype(np.float32)` gives (as bit patterns, so the Rust test compares
exactly), and for each file convoy must refuse the dtype text the error must
name. The files are tiny and committed; `cargo test` needs no Python.

Second job: checking that NumPy reads what convoy writes. `cargo test --test
npy_numpy` writes files with convoy's writer into target/tmp/npy-from-rust/
together with a manifest.json of the values it meant to write. When that
folder exists this script loads every file with np.load and checks dtype,
shape and bits, so run `cargo test --test npy_numpy` first, then this
script. (Verified this way with NumPy 2.4.6: all files loaded and matched.)
"""

import io
import json
import math
import os
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.normpath(os.path.join(HERE, "..", "..", ".."))
RUST_OUT = os.path.join(ROOT, "target", "tmp", "npy-from-rust")

NAN, INF = float("nan"), float("inf")


def readable_cases():
    """(file name, array, format version or None for np.save's choice)."""
    f4 = [[0.0, -0.0, 1.5, -2.25], [3.4028235e38, 1e-45, INF, NAN]]
    # f8 values that exercise rounding to f32: overflow to -inf, underflow
    # to 0, ties to even (1 + 2^-24 -> 1, 1 + 3*2^-24 -> 1 + 2^-22).
    f8 = [0.1, -1e300, 1e-50, 1 + 2**-24, 1 + 3 * 2**-24, math.pi, NAN]
    f2 = [0.0, -0.0, 1.0, 65504.0, 2**-24, 1023 * 2**-24, 2**-14, INF, -INF, NAN, 1 / 3]
    i8 = [-(2**63), -1, 0, 2**53 + 1, 2**63 - 1]
    i4 = [-(2**31), -1, 0, 2**24 + 1, 2**31 - 1]
    cases = [
        ("f4_le.npy", np.array(f4, "<f4"), None),
        ("f4_be.npy", np.array(f4, ">f4"), None),
        ("f8_le.npy", np.array(f8, "<f8"), None),
        ("f8_be.npy", np.array(f8, ">f8"), None),
        ("f2_le.npy", np.array(f2, "<f2"), None),
        ("f2_be.npy", np.array(f2, ">f2"), None),
        ("u1.npy", np.array([0, 1, 127, 128, 255], "|u1"), None),
        ("i1.npy", np.array([-128, -1, 0, 1, 127], "|i1"), None),
        ("u2_le.npy", np.array([0, 1, 65535], "<u2"), None),
        ("u2_be.npy", np.array([0, 1, 65535], ">u2"), None),
        ("i2_le.npy", np.array([-32768, -1, 32767], "<i2"), None),
        ("i4_le.npy", np.array(i4, "<i4"), None),
        ("i4_be.npy", np.array(i4, ">i4"), None),
        ("u4_le.npy", np.array([0, 2**24 + 1, 2**32 - 1], "<u4"), None),
        ("i8_le.npy", np.array(i8, "<i8"), None),
        ("i8_be.npy", np.array(i8, ">i8"), None),
        ("u8_le.npy", np.array([0, 2**64 - 1], "<u8"), None),
        ("bool.npy", np.array([True, False, True], "|b1"), None),
        ("f4_v2.npy", np.arange(6, dtype="<f4").reshape(2, 3), (2, 0)),
        ("f4_v3.npy", np.arange(6, dtype="<f4").reshape(2, 3), (3, 0)),
        ("i8_be_v2.npy", np.array(i8, ">i8"), (2, 0)),
        # np.save writes F-contiguous arrays with fortran_order True.
        ("f4_fortran_3d.npy", np.asfortranarray(np.arange(24, dtype="<f4").reshape(2, 3, 4)), None),
        ("i8_be_fortran.npy", np.asfortranarray(np.arange(6, dtype=">i8").reshape(3, 2) - 3), None),
        ("f2_fortran_v2.npy", np.asfortranarray(np.arange(6, dtype="<f2").reshape(2, 3) / 4), (2, 0)),
        ("f4_0d.npy", np.array(3.5, "<f4"), None),
        ("f8_be_0d.npy", np.array(-0.1, ">f8"), None),
        ("f4_empty_1d.npy", np.zeros((0,), "<f4"), None),
        ("f4_empty_3d.npy", np.zeros((2, 0, 3), "<f4"), None),
        ("f4_empty_fortran.npy", np.asfortranarray(np.zeros((0, 3), "<f4")), None),
        ("f4_batch_nchw.npy", (np.arange(2 * 3 * 4 * 4, dtype="<f4") / 7).reshape(2, 3, 4, 4), None),
    ]
    return cases


def hand_made_header():
    """A header NumPy's writer would never produce but its reader accepts:
    keys out of order, double quotes, extra spaces, trailing commas."""
    text = "{ \"shape\" : ( 2 , 2, ) ,'fortran_order':True,  \"descr\":'<i2', }"
    header = text.encode("latin1")
    pad = -(10 + len(header) + 1) % 64
    header += b" " * pad + b"\n"
    data = np.array([1, 3, 2, 4], "<i2").tobytes()  # column-major [[1, 2], [3, 4]]
    return b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header + data


def rejected_cases():
    """(file name, array, version); convoy must name the dtype text."""
    return [
        ("reject_object.npy", np.array([1, "x"], dtype=object), None),
        ("reject_structured.npy", np.zeros(2, [("a", "<f4"), ("b", "|u1")]), None),
        ("reject_unicode.npy", np.array(["ab", "c"], "<U3"), None),
        ("reject_complex.npy", np.array([1 + 2j], "<c8"), None),
        ("reject_datetime.npy", np.array(["2020-01-01"], "<M8[s]"), None),
        # Version 3.0 exists for UTF-8 field names (numpy.lib.format docs).
        ("reject_structured_v3.npy", np.zeros(1, [("é", "<f4")]), (3, 0)),
    ]


def save(name, array, version):
    buf = io.BytesIO()
    if version is None:
        np.save(buf, array, allow_pickle=True)
    else:
        np.lib.format.write_array(buf, array, version=version, allow_pickle=True)
    with open(os.path.join(HERE, name), "wb") as f:
        f.write(buf.getvalue())


def f32_record(array):
    with np.errstate(over="ignore"):  # f8 -1e300 overflowing to -inf is meant
        values = np.ascontiguousarray(array.astype(np.float32)).reshape(-1)
    return {
        "shape": list(array.shape),
        "bits": [int(b) for b in values.view("<u4")],
        # For readers of the JSON only; the test compares "bits".
        "values": [float(v) if math.isfinite(v) else str(v) for v in values],
    }


def descr_text(array):
    descr = array.dtype.descr
    if len(descr) == 1 and descr[0][0] == "":
        return descr[0][1]
    return repr(descr)


def compact_json(expected):
    """One line per file, so a diff of regenerated data stays readable."""
    parts = []
    for key, value in sorted(expected.items()):
        if isinstance(value, dict):
            rows = [f"  {json.dumps(k)}: {json.dumps(v, sort_keys=True)}" for k, v in sorted(value.items())]
            parts.append(f" {json.dumps(key)}: {{\n" + ",\n".join(rows) + "\n }")
        else:
            parts.append(f" {json.dumps(key)}: {json.dumps(value)}")
    return "{\n" + ",\n".join(parts) + "\n}\n"


def write_references():
    expected = {"numpy_version": np.__version__, "readable": {}, "rejected": {}}
    for name, array, version in readable_cases():
        save(name, array, version)
        back = np.load(os.path.join(HERE, name))
        assert back.dtype == array.dtype and back.shape == array.shape, name
        expected["readable"][name] = f32_record(array)

    with open(os.path.join(HERE, "header_style.npy"), "wb") as f:
        f.write(hand_made_header())
    styled = np.load(os.path.join(HERE, "header_style.npy"))  # NumPy accepts it
    assert styled.tolist() == [[1, 2], [3, 4]], styled
    expected["readable"]["header_style.npy"] = f32_record(styled)

    for name, array, version in rejected_cases():
        save(name, array, version)
        expected["rejected"][name] = descr_text(array)

    # What np.save writes for float32 arrays; convoy's writer must produce the
    # same header dict text and data bytes.
    writer = {}
    for name, shape in [
        ("writer_2x3.npy", (2, 3)),
        ("writer_0d.npy", ()),
        ("writer_5.npy", (5,)),
        ("writer_empty.npy", (0, 3)),
        ("writer_batch.npy", (2, 1, 2, 2)),
    ]:
        n = int(np.prod(shape))
        array = (np.arange(n, dtype="<f4") - 1.5).reshape(shape)
        save(name, array, None)
        writer[name] = f32_record(array)
    expected["writer"] = writer

    with open(os.path.join(HERE, "expected.json"), "w") as f:
        f.write(compact_json(expected))
    print(f"wrote {len(expected['readable']) + len(expected['rejected']) + len(writer)} files")


def check_rust_output():
    manifest_path = os.path.join(RUST_OUT, "manifest.json")
    if not os.path.exists(manifest_path):
        print(f"no {manifest_path}: run `cargo test --test npy_numpy` to check NumPy reads convoy's files")
        return True
    with open(manifest_path) as f:
        manifest = json.load(f)
    ok = True
    for entry in manifest:
        path = os.path.join(RUST_OUT, entry["file"])
        array = np.load(path, allow_pickle=False)
        bits = [int(b) for b in np.ascontiguousarray(array).reshape(-1).view("<u4")]
        good = (
            array.dtype == np.dtype("<f4")
            and list(array.shape) == entry["shape"]
            and bits == entry["bits"]
        )
        ok &= good
        print(f"np.load {entry['file']}: shape {array.shape} {'ok' if good else 'MISMATCH'}")
    return ok


if __name__ == "__main__":
    write_references()
    sys.exit(0 if check_rust_output() else 1)
