#!/usr/bin/env python3
"""Seeds the fuzz corpora (fuzz/corpus/<target>/) from real files of the repository.

Run from anywhere: python3 fuzz/make_seeds.py. Needs the convoy binary (built with
`cargo build` if missing) to turn two ONNX test models into small bundles. The corpora are
not committed: they are regenerated from files that are.
"""
import pathlib
import struct
import subprocess

FUZZ = pathlib.Path(__file__).resolve().parent
REPO = FUZZ.parent
CORPUS = FUZZ / "corpus"
SAMPLES = REPO / "models" / "stamped-parts" / "samples"


def put(target, name, data):
    d = CORPUS / target
    d.mkdir(parents=True, exist_ok=True)
    (d / name).write_bytes(data)


def varint(n):
    out = bytearray()
    while True:
        b = n & 0x7F
        n >>= 7
        out.append(b | (0x80 if n else 0))
        if not n:
            return bytes(out)


def field(number, wire, payload):
    """One protobuf field (wire type 0 varint, 2 length-delimited), per the protobuf encoding
    documentation."""
    key = varint(number << 3 | wire)
    if wire == 0:
        return key + varint(payload)
    return key + varint(len(payload)) + payload


def tensor_sample(shape, values):
    packed = b"".join(varint(d) for d in shape)
    t = field(1, 2, packed) + field(2, 2, struct.pack(f"<{len(values)}f", *values))
    return field(2, 2, t)


def image_sample(data):
    return field(1, 2, data)


def request(samples, model=b"", version=b"", top_k=0, tag=b""):
    msg = b""
    if model:
        msg += field(1, 2, model)
    if version:
        msg += field(2, 2, version)
    for s in samples:
        msg += field(3, 2, s)
    if top_k:
        msg += field(4, 0, top_k)
    if tag:
        msg += field(6, 2, tag)
    return msg


def convoy_binary():
    exe = REPO / "target" / "debug" / "convoy"
    if not exe.exists():
        subprocess.run(["cargo", "build", "--bin", "convoy"], cwd=REPO, check=True)
    return exe


def main():
    images = sorted(p for p in (REPO / "tests" / "data" / "prepare").iterdir()
                    if p.suffix in {".png", ".jpg", ".bmp", ".gif", ".tiff", ".webp"})
    images += sorted(SAMPLES.glob("*.png"))

    # image_prepare: mode byte, then the file (bit 0 clear: an image).
    for p in images:
        for mode in (0x00, 0x0A, 0x34):
            put("image_prepare", f"{mode:02x}-{p.name}", bytes([mode]) + p.read_bytes())
    zeros = struct.pack("<3I", 1, 64, 64) + bytes(4 * 64 * 64)
    put("image_prepare", "tensor-1x64x64", bytes([0x01, 3]) + zeros)
    put("image_prepare", "tensor-64x64", bytes([0x01, 2]) + struct.pack("<2I", 64, 64) + bytes(16))

    # onnx_import: the small exported models (the large ones make each run seconds long).
    onnx = [REPO / "tests/onnx/digits/digits_cnn.onnx"]
    onnx += sorted((REPO / "tests/onnx/zoo").glob("awkward.*.onnx"))
    onnx += [REPO / "tests/onnx/zoo/lenet.torchscript.onnx"]
    for p in onnx:
        put("onnx_import", p.name, p.read_bytes())

    # bundle_reader: mode byte 0 (as is) and 1 (re-sealed), then a bundle.
    exe = convoy_binary()
    bundles = [REPO / "models" / "stamped-parts.cvb"]
    out = FUZZ / "corpus" / "_built"
    out.mkdir(parents=True, exist_ok=True)
    for src, name in ((REPO / "tests/onnx/digits/digits_cnn.onnx", "digits"),
                      (REPO / "tests/onnx/zoo/awkward.torchscript.onnx", "awkward")):
        dst = out / f"{name}.cvb"
        subprocess.run([str(exe), "import", str(src), "-o", str(dst)], check=True,
                       stdout=subprocess.DEVNULL)
        bundles.append(dst)
    for b in bundles:
        for mode in (0, 1):
            put("bundle_reader", f"{mode}-{b.name}", bytes([mode]) + b.read_bytes())

    # request_decode: PredictRequest bodies, hand-encoded.
    zeros = [0.0] * (64 * 64)
    put("request_decode", "tensor", request([tensor_sample([1, 64, 64], zeros)]))
    put("request_decode", "named", request([tensor_sample([1, 64, 64], zeros)],
                                           model=b"stamped-parts", version=b"1.0.0",
                                           top_k=3, tag=b"t"))
    put("request_decode", "bad-shape", request([tensor_sample([64, 64], [0.0] * 4)]))
    put("request_decode", "empty", request([]))
    for p in sorted(SAMPLES.glob("*-1.png")):
        put("request_decode", f"image-{p.name}", request([image_sample(p.read_bytes())]))
    put("request_decode", "two-samples",
        request([image_sample((SAMPLES / "sound-1.png").read_bytes()),
                 tensor_sample([1, 64, 64], zeros)]))


if __name__ == "__main__":
    main()
