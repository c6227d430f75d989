"""The stateworth.v1 API definition: buf lint clean, generated code committed and up to date."""

from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
from google.protobuf import descriptor_pb2

ROOT = Path(__file__).resolve().parents[1]
PROTO = ROOT / "proto"
FILES = sorted((PROTO / "stateworth" / "v1").glob("*.proto"))


def _buf() -> str:
    here = Path(sys.executable).parent / "buf"
    found = str(here) if here.exists() else shutil.which("buf")
    if not found:
        pytest.fail("the buf binary is missing; install the test extras (buf-bin)")
    return found


def test_buf_lint_is_clean():
    r = subprocess.run([_buf(), "lint"], cwd=PROTO, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stdout + r.stderr


def test_generated_code_matches_the_proto_files():
    """Compile the .proto files afresh and compare each file descriptor with the one the
    committed *_pb2.py modules register (independent of the protoc version's header lines)."""
    from grpc_tools import protoc

    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "set.pb"
        include = str(Path(protoc.__file__).parent / "_proto")
        rc = protoc.main(["protoc", f"-I{PROTO}", f"-I{include}", f"--descriptor_set_out={out}",
                          *[str(f.relative_to(PROTO)) for f in FILES]])
        assert rc == 0
        fresh = descriptor_pb2.FileDescriptorSet.FromString(out.read_bytes())
    import importlib

    def strip(fd):  # json_name is filled in by --descriptor_set_out only; it is derived, not source
        for m in fd.message_type:
            stack = [m]
            while stack:
                msg = stack.pop()
                for f in msg.field:
                    f.ClearField("json_name")
                stack.extend(msg.nested_type)
        return fd

    assert FILES, "no .proto files found"
    for fd in fresh.file:
        stem = Path(fd.name).stem
        mod = importlib.import_module(f"stateworth.v1.{stem}_pb2")
        committed = descriptor_pb2.FileDescriptorProto.FromString(mod.DESCRIPTOR.serialized_pb)
        assert strip(committed) == strip(fd), f"{fd.name}: generated code is stale; run `make proto` and commit the result"
        for suffix in ("_pb2.pyi", "_pb2_grpc.py"):
            assert (PROTO / "stateworth" / "v1" / f"{stem}{suffix}").is_file(), f"{stem}{suffix} is not committed"


def test_every_service_method_has_a_stub_and_standard_names():
    from stateworth.v1 import admin_service_pb2, admin_service_pb2_grpc, valuation_service_pb2
    from stateworth.v1 import valuation_service_pb2_grpc

    for mod, grpc_mod in ((valuation_service_pb2, valuation_service_pb2_grpc),
                          (admin_service_pb2, admin_service_pb2_grpc)):
        for svc in mod.DESCRIPTOR.services_by_name.values():
            servicer = getattr(grpc_mod, f"{svc.name}Servicer")
            for m in svc.methods:
                assert hasattr(servicer, m.name)
                assert m.input_type.name == f"{m.name}Request"
                assert m.output_type.name == f"{m.name}Response"


def test_packed_fast_paths_equal_the_plain_encoding():
    import numpy as np

    from stateworth.v1 import valuation_service_pb2 as pb
    from stateworth.v1.packed import packed_codes, set_doubles

    rng = np.random.default_rng(0)
    for hi in (3, 200, 70_000, 2**31 - 1):
        a = rng.integers(0, hi, size=500)
        fast = pb.StateColumn()
        fast.MergeFromString(packed_codes(3, a))
        assert fast.SerializeToString() == pb.StateColumn(codes=a.tolist()).SerializeToString()
    x = rng.normal(size=300)
    r = pb.BatchGetValuesResponse()
    set_doubles(r, "values", x)
    assert list(r.values) == x.tolist()
    with pytest.raises(ValueError):
        packed_codes(3, np.array([-1]))
