"""A second language against a real server, and the proto lint.

* ``clients/node/check.js`` (Node.js, @grpc/grpc-js and @grpc/proto-loader, built from
  proto/ alone) calls health, CreateProblem, AddCandidates, Repair, RepairStream, a
  malformed request and a short deadline; it checks the repaired cost against its own
  recomputation and a brute-force optimum over all 64 assignments, and reads the error's
  google.rpc.Status details from the trailer.
* ``buf lint`` (the buf CLI from npm, rules in buf.yaml: STANDARD plus COMMENTS) over
  proto/.

The npm packages are installed by this module from clients/node/package-lock.json
(``npm ci``) when missing. Skipped only when node is not on the machine.
"""

from __future__ import annotations

import json
import shutil
import subprocess

import pytest

from flipfix.service.server import create_server

from conftest import ROOT

NODE_DIR = ROOT / "clients" / "node"
pytestmark = pytest.mark.skipif(shutil.which("node") is None, reason="node is not installed")


@pytest.fixture(scope="module")
def node_modules():
    """clients/node/node_modules, installed from the lock file when missing."""
    wanted = [NODE_DIR / "node_modules" / p for p in ("@grpc/grpc-js", "@grpc/proto-loader",
                                                       "protobufjs", ".bin/buf")]
    if not all(p.exists() for p in wanted):
        npm = shutil.which("npm")
        if npm is None:
            pytest.fail("node is installed but npm is not: cannot install clients/node")
        out = subprocess.run([npm, "ci", "--no-audit", "--no-fund"], cwd=NODE_DIR,
                             capture_output=True, text=True, timeout=600)
        assert out.returncode == 0, out.stderr[-2000:]
    return NODE_DIR / "node_modules"


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("node") / "flipfix.sqlite3"
    srv = create_server("127.0.0.1:0", db_path=str(db), workers=1, queue_size=2)
    from flipfix.service.client import FlipfixClient

    with FlipfixClient(srv.address) as fx:  # health answers SERVING once the workers are warm
        fx.wait_ready()
    yield srv
    srv.shutdown(grace=1.0)


def test_node_client_calls_every_kind_of_rpc(node_modules, server):
    out = subprocess.run(["node", str(NODE_DIR / "check.js"), server.address, str(ROOT / "proto")],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr[-3000:]
    seen = json.loads(out.stdout.strip().splitlines()[-1])
    assert seen["health"] == "SERVING"
    assert seen["ids"] == ["c0", "c1", "c2"]
    # the optimum under the late constraints: brute force over the 64 assignments (in JS)
    assert seen["repaired_cost"] == pytest.approx(seen["brute_force_cost"], abs=1e-9)
    assert seen["repaired_cost"] == pytest.approx(seen["recomputed_cost"], abs=1e-9)
    assert seen["status"] == "REPAIR_STATUS_OPTIMAL" and seen["method_used"] == "METHOD_CPSAT"
    assert seen["stream"]["progress"] >= 1 and seen["stream"]["status"] != "REPAIR_STATUS_UNSPECIFIED"
    assert seen["error"]["reason"] == "INVALID_FIELD"
    assert seen["error"]["field"] == "constraints[0].fix.values.values[1]"
    assert seen["error"]["message"].startswith("constraints[0].fix.values.values[1]: ")
    assert 0 < seen["deadline"]["budget"] < 1.5 and seen["deadline"]["elapsed"] < 1.5


def test_buf_lint_passes_over_the_protos(node_modules):
    buf = node_modules / ".bin" / "buf"
    out = subprocess.run([str(buf), "lint"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stdout + out.stderr
