"""Generate the Python protobuf module of the wire format from ``proto/jointstat/v1/*.proto``.

Theory of operation: the .proto files are the one source of the wire format. This script runs the protobuf
compiler bundled with the pinned ``grpcio-tools`` (``python -m grpc_tools.protoc``) with ``proto/`` as the include
root, so each file keeps its versioned name (``jointstat/v1/session.proto``) in the descriptor pool, and writes the
message module and its type stub under ``service/jointstat/wire/``. The output is committed; the test
``tests/test_wire.py`` regenerates into a temporary folder and checks that nothing differs, so a change
to a .proto without regenerating fails CI. Only messages are generated: the transport registers the ``Session``
service with generic handlers whose method path it reads from the generated descriptor, so no generated service
stub (whose absolute imports would not fit the package) is needed.

Usage: ``.venv/bin/python proto/generate.py`` from the repository root.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PROTO_ROOT = ROOT / "proto"
WIRE_DIR = ROOT / "service" / "jointstat" / "wire"
PROTO_FILES = ("jointstat/v1/session.proto",)


def generate(out_dir: Path = WIRE_DIR) -> list[Path]:
    """Compile every file of ``PROTO_FILES`` into ``out_dir``; returns the paths written."""
    from grpc_tools import protoc

    out_dir.mkdir(parents=True, exist_ok=True)
    args = ["grpc_tools.protoc", f"-I{PROTO_ROOT}", f"--python_out={out_dir}", f"--pyi_out={out_dir}"]
    code = protoc.main([*args, *(str(PROTO_ROOT / name) for name in PROTO_FILES)])
    if code != 0:
        raise RuntimeError(f"protoc failed with exit code {code} for {', '.join(PROTO_FILES)}")
    written = []
    for name in PROTO_FILES:
        stem = name.removesuffix(".proto")
        written += [out_dir / f"{stem}_pb2.py", out_dir / f"{stem}_pb2.pyi"]
    return written


if __name__ == "__main__":
    for path in generate():
        print(path.relative_to(ROOT))
    sys.exit(0)
