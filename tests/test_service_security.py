"""TLS, bearer tokens and roles, tenants and quotas, on real servers on loopback.

Certificates are made here with the ``cryptography`` package (a test CA, a server
certificate for 127.0.0.1/localhost, a client certificate, and an unrelated CA); every
TLS test is a real handshake through gRPC's own TLS stack.
"""

from __future__ import annotations

import datetime
import json
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path

import grpc
import pytest
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import NameOID
from grpc_health.v1 import health_pb2, health_pb2_grpc

from flipfix.repair.documents import forms as documents
from flipfix.repair.errors import InputError
from flipfix.service import auth, convert
from flipfix.service.client import FlipfixClient
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.server import SERVICE_NAME, create_server, is_loopback
from flipfix.service.store import SCHEMA_VERSION, Store
from flipfix.service.token_cli import make_token

from conftest import rpc_error

ROOT = Path(__file__).resolve().parents[1]
SMALL = {"vartype": "BINARY", "linear": {"a": -1.0, "b": -1.0, "c": 0.5},
         "quadratic": [["a", "b", 2.0], ["b", "c", -1.0]]}
CANDS = [{"id": "k1", "assignment": {"a": 1, "b": 0, "c": 1}},
         {"id": "k2", "assignment": {"a": 0, "b": 1, "c": 0}}]


# ------------------------------------------------------------ certificates
def _key():
    return ec.generate_private_key(ec.SECP256R1())


def _name(cn: str):
    return x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, cn)])


def _cert(subject_key, subject: str, issuer_key, issuer: str, *, ca: bool, san=None):
    now = datetime.datetime.now(datetime.timezone.utc)
    b = (x509.CertificateBuilder().subject_name(_name(subject)).issuer_name(_name(issuer))
         .public_key(subject_key.public_key()).serial_number(x509.random_serial_number())
         .not_valid_before(now - datetime.timedelta(minutes=5))
         .not_valid_after(now + datetime.timedelta(days=1))
         .add_extension(x509.BasicConstraints(ca=ca, path_length=None), critical=True))
    if san:
        b = b.add_extension(x509.SubjectAlternativeName(san), critical=False)
    return b.sign(issuer_key, hashes.SHA256())


def _write(path: Path, cert=None, key=None) -> str:
    data = b""
    if cert is not None:
        data += cert.public_bytes(serialization.Encoding.PEM)
    if key is not None:
        data += key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                  serialization.NoEncryption())
    path.write_bytes(data)
    return str(path)


@pytest.fixture(scope="module")
def pki(tmp_path_factory):
    d = tmp_path_factory.mktemp("pki")
    ca_key, other_key = _key(), _key()
    ca = _cert(ca_key, "flipfix test CA", ca_key, "flipfix test CA", ca=True)
    other = _cert(other_key, "unrelated CA", other_key, "unrelated CA", ca=True)
    import ipaddress
    srv_key, cli_key, rogue_key = _key(), _key(), _key()
    san = [x509.DNSName("localhost"), x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]
    srv = _cert(srv_key, "localhost", ca_key, "flipfix test CA", ca=False, san=san)
    cli = _cert(cli_key, "planner laptop", ca_key, "flipfix test CA", ca=False)
    rogue = _cert(rogue_key, "rogue", other_key, "unrelated CA", ca=False)
    return {"ca": _write(d / "ca.pem", ca), "other_ca": _write(d / "other.pem", other),
            "server_cert": _write(d / "srv.pem", srv), "server_key": _write(d / "srv.key", key=srv_key),
            "client_cert": _write(d / "cli.pem", cli), "client_key": _write(d / "cli.key", key=cli_key),
            "rogue_cert": _write(d / "rogue.pem", rogue),
            "rogue_key": _write(d / "rogue.key", key=rogue_key)}


def _health(client: FlipfixClient):
    return health_pb2_grpc.HealthStub(client.channel).Check(
        health_pb2.HealthCheckRequest(service=SERVICE_NAME), timeout=10)


# --------------------------------------------------------------------- TLS
def test_tls_handshake_with_the_right_ca_and_not_with_a_wrong_one(tmp_path, pki):
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "t.sqlite3"), warm=False,
                       tls_cert=pki["server_cert"], tls_key=pki["server_key"]) as srv:
        target = f"localhost:{srv.port}"
        with FlipfixClient(target, ca=pki["ca"], timeout=10) as fx:
            assert _health(fx).status == health_pb2.HealthCheckResponse.SERVING
            fx.create_problem("p", SMALL)
            assert [i.name for i in fx.list_problems()] == ["p"]
        with FlipfixClient(target, ca=pki["other_ca"], timeout=5) as fx:
            assert rpc_error(lambda: _health(fx)).code() == grpc.StatusCode.UNAVAILABLE
        with FlipfixClient(target, timeout=5) as fx:  # plain text to a TLS port
            assert rpc_error(lambda: _health(fx)).code() == grpc.StatusCode.UNAVAILABLE


def test_mutual_tls_needs_a_client_certificate_from_the_client_ca(tmp_path, pki):
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "m.sqlite3"), warm=False,
                       tls_cert=pki["server_cert"], tls_key=pki["server_key"],
                       tls_client_ca=pki["ca"]) as srv:
        target = f"localhost:{srv.port}"
        with FlipfixClient(target, ca=pki["ca"], cert=pki["client_cert"],
                           key=pki["client_key"], timeout=10) as fx:
            assert _health(fx).status == health_pb2.HealthCheckResponse.SERVING
        with FlipfixClient(target, ca=pki["ca"], timeout=5) as fx:  # no client certificate
            assert rpc_error(lambda: _health(fx)).code() == grpc.StatusCode.UNAVAILABLE
        with FlipfixClient(target, ca=pki["ca"], cert=pki["rogue_cert"], key=pki["rogue_key"],
                           timeout=5) as fx:
            assert rpc_error(lambda: _health(fx)).code() == grpc.StatusCode.UNAVAILABLE


def test_tls_settings_are_checked_before_anything_starts(tmp_path, pki):
    with pytest.raises(InputError) as e:
        create_server("127.0.0.1:0", db_path=str(tmp_path / "x.sqlite3"), warm=False,
                      tls_cert=pki["server_cert"])
    assert e.value.field == "--tls-key"
    with pytest.raises(InputError) as e:
        create_server("127.0.0.1:0", db_path=str(tmp_path / "x.sqlite3"), warm=False,
                      tls_cert=str(tmp_path / "missing.pem"), tls_key=pki["server_key"])
    assert e.value.field == "--tls-cert"


def test_a_public_address_needs_tls_and_tokens_or_the_explicit_option(tmp_path, pki):
    assert is_loopback("127.0.0.1:1") and is_loopback("[::1]:1") and is_loopback("localhost:1")
    assert not is_loopback("0.0.0.0:1") and not is_loopback("10.1.2.3:1")
    with pytest.raises(InputError) as e:
        create_server("0.0.0.0:0", db_path=str(tmp_path / "x.sqlite3"), warm=False)
    assert e.value.field == "--host" and "--allow-insecure-public-bind" in e.value.message
    with pytest.raises(InputError) as e:  # TLS without tokens is not enough
        create_server("0.0.0.0:0", db_path=str(tmp_path / "x.sqlite3"), warm=False,
                      tls_cert=pki["server_cert"], tls_key=pki["server_key"])
    assert "tokens" in e.value.message and "TLS" not in e.value.message.split("without")[1]
    out = subprocess.run([sys.executable, "-m", "flipfix.service.cli", "serve", "--host",
                          "0.0.0.0", "--port", "0", "--db", str(tmp_path / "y.sqlite3")],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 2 and len(out.stderr.strip().splitlines()) == 1
    assert "--allow-insecure-public-bind" in out.stderr
    with create_server("0.0.0.0:0", db_path=str(tmp_path / "z.sqlite3"), warm=False,
                       allow_insecure_public_bind=True) as srv:
        assert srv.port > 0


# ------------------------------------------------------------ tokens, roles
def test_every_flipfix_method_has_a_role_and_unlisted_methods_are_admin_only():
    from flipfix.service.generated import grow_pb2, timeline_pb2

    methods = {f"/{service.full_name}/{m.name}"
               for module in (pb, grow_pb2, timeline_pb2)
               for service in module.DESCRIPTOR.services_by_name.values()
               for m in service.methods}
    assert methods <= set(auth.METHOD_ROLES), sorted(methods - set(auth.METHOD_ROLES))
    assert set(auth.METHOD_ROLES.values()) <= set(auth.ROLES)


def test_a_method_not_listed_needs_admin(tmp_path):
    """A method of a service added later (not in METHOD_ROLES) is refused to a planner and
    run for an admin, through the interceptor itself."""
    from collections import namedtuple

    path = str(tmp_path / "t.jsonl")
    planner = make_token(path, tenant="n", role="planner")
    admin = make_token(path, tenant="n", role="admin")
    icpt = auth.AuthInterceptor(auth.TokenFile(path))
    ran = []
    handler = grpc.unary_unary_rpc_method_handler(lambda req, ctx: ran.append(auth.current()))
    Details = namedtuple("Details", "method invocation_metadata")

    class Aborted(Exception):
        pass

    class Context:
        def abort(self, code, details):
            raise Aborted(code, details)

    def call(token):
        h = icpt.intercept_service(lambda d: handler, Details(
            "/flipfix.v1.Later/Change", (("authorization", f"Bearer {token}"),)))
        return h.unary_unary(None, Context())

    with pytest.raises(Aborted) as e:
        call(planner)
    assert e.value.args[0] == grpc.StatusCode.PERMISSION_DENIED and "'admin'" in e.value.args[1]
    call(admin)
    assert ran == [auth.Principal("n", "admin")]


@pytest.fixture()
def tokens(tmp_path):
    path = str(tmp_path / "tokens.jsonl")
    made = {(tenant, role): make_token(path, tenant=tenant, role=role)
            for tenant in ("north", "south") for role in auth.ROLES}
    made["path"] = path
    return made


@pytest.fixture()
def secured(tmp_path, tokens):
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "s.sqlite3"), warm=False,
                        workers=1, token_file=tokens["path"], quota_problems=3,
                        quota_candidates=5)
    yield srv
    srv.shutdown(grace=0.5)


def _client(srv, token=None) -> FlipfixClient:
    return FlipfixClient(srv.address, token=token, timeout=30)


def test_tokens_and_roles(secured, tokens):
    text = Path(tokens["path"]).read_text()
    for (tenant, role), token in ((k, v) for k, v in tokens.items() if k != "path"):
        assert token not in text and auth.token_digest(token) in text
    with _client(secured) as fx:  # no token: health answers, nothing else
        assert _health(fx).status == health_pb2.HealthCheckResponse.SERVING
        e = rpc_error(lambda: fx.list_problems())
        assert e.code() == grpc.StatusCode.UNAUTHENTICATED
    with _client(secured, token="not-a-token") as fx:
        e = rpc_error(lambda: fx.list_problems())
        assert e.code() == grpc.StatusCode.UNAUTHENTICATED and "unknown token" in e.details()
    with _client(secured, tokens["north", "reader"]) as fx:
        assert fx.list_problems() == []
        e = rpc_error(lambda: fx.create_problem("p", SMALL))
        assert e.code() == grpc.StatusCode.PERMISSION_DENIED
        assert "CreateProblem needs the role 'planner'" in e.details()
    with _client(secured, tokens["north", "planner"]) as fx:
        fx.create_problem("p", SMALL)
        fx.add_candidates("p", CANDS)
        assert fx.repair("p", [], time_limit=0.3)["status"] in ("optimal", "feasible")
    with _client(secured, tokens["north", "reader"]) as fx:
        assert [i.name for i in fx.list_problems()] == ["p"]


def test_token_from_the_environment_and_reload_without_restart(secured, tokens, monkeypatch):
    from flipfix.service import connect

    monkeypatch.setenv(connect.TOKEN_ENV, tokens["north", "reader"])
    assert connect.read_token(None) == tokens["north", "reader"]
    late = make_token(tokens["path"], tenant="west", role="reader")
    with _client(secured, late) as fx:
        assert rpc_error(lambda: fx.list_problems()).code() == grpc.StatusCode.UNAUTHENTICATED
        assert secured.reload_tokens()
        assert fx.list_problems() == []
        Path(tokens["path"]).write_text("{broken\n")  # a bad file keeps the loaded tokens
        assert not secured.reload_tokens()
        assert fx.list_problems() == []


def test_serve_reloads_the_token_file_on_sighup(tmp_path, tokens):
    proc = subprocess.Popen([sys.executable, "-m", "flipfix.service.cli", "serve", "--port", "0",
                             "--db", str(tmp_path / "h.sqlite3"), "--workers", "1",
                             "--token-file", tokens["path"]],
                            cwd=ROOT, stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stderr.readline()
        while "serving on" not in line:
            assert line, "server exited before serving"
            line = proc.stderr.readline()
        port = int(line.split("serving on ")[1].split()[0].rsplit(":", 1)[1])
        late = make_token(tokens["path"], tenant="west", role="reader")
        with FlipfixClient(f"127.0.0.1:{port}", token=late, timeout=10) as fx:
            assert rpc_error(lambda: fx.list_problems()).code() == grpc.StatusCode.UNAUTHENTICATED
            proc.send_signal(signal.SIGHUP)
            line = proc.stderr.readline()
            while "reloaded" not in line:
                assert line, "server exited"
                line = proc.stderr.readline()
            assert fx.list_problems() == []
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_token_command_prints_a_token_once_and_appends_its_hash(tmp_path):
    path = tmp_path / "t.jsonl"
    out = subprocess.run([sys.executable, "-m", "flipfix.service.cli", "token", "--file", str(path),
                          "--tenant", "north", "--role", "planner", "--name", "ops"],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 0
    token = out.stdout.strip()
    [line] = path.read_text().splitlines()
    assert json.loads(line) == {"sha256": auth.token_digest(token), "tenant": "north",
                                "role": "planner", "name": "ops"}
    assert oct(path.stat().st_mode & 0o777) == "0o600"
    assert auth.TokenFile(str(path)).lookup(token) == auth.Principal("north", "planner")


# ------------------------------------------------------------------ tenants
def _every_rpc(stub, name: str):
    """Every Flipfix RPC aimed at problem ``name`` (the ones that take a problem)."""
    fix = pb.Constraint(fix=pb.FixVariables(values=convert.dict_to_assignment({"a": 0})))
    stress = pb.StressRequest(problem=name, scenarios=2)
    stress.family.fix_k = 1
    return {
        "GetProblem": lambda: stub.GetProblem(pb.GetProblemRequest(name=name)),
        "ReplaceProblem": lambda: stub.ReplaceProblem(pb.ReplaceProblemRequest(
            name=name, model=convert.doc_to_model(SMALL))),
        "DeleteProblem": lambda: stub.DeleteProblem(pb.DeleteProblemRequest(name=name)),
        "AddCandidates": lambda: stub.AddCandidates(pb.AddCandidatesRequest(
            problem=name, candidates=convert.candidates_to_batch(
                documents.parse_problem(SMALL), [{"id": "x9", "assignment": {"a": 1, "b": 1,
                                                                            "c": 1}}]))),
        "ListCandidates": lambda: stub.ListCandidates(pb.ListCandidatesRequest(problem=name)),
        "RemoveCandidates": lambda: stub.RemoveCandidates(pb.RemoveCandidatesRequest(
            problem=name, ids=["k1"])),
        "Repair": lambda: stub.Repair(pb.RepairRequest(problem=name, constraints=[fix])),
        "RepairStream": lambda: list(stub.RepairStream(pb.RepairRequest(problem=name,
                                                                        constraints=[fix]))),
        "ProfileRobustness": lambda: stub.ProfileRobustness(pb.RobustnessRequest(problem=name)),
        "StressTest": lambda: stub.StressTest(stress),
        "StressTestStream": lambda: list(stub.StressTestStream(stress)),
        "ParetoFront": lambda: stub.ParetoFront(pb.ParetoRequest(problem=name,
                                                                 constraints=[fix])),
        "CurateLibrary": lambda: stub.CurateLibrary(pb.CurateRequest(stress=stress, m=1,
                                                                     keep=True)),
    }


def test_a_tenant_cannot_see_or_touch_another_tenants_problem(secured, tokens):
    from flipfix.service.connect import Connection, open_channel

    def stub(tenant):
        return pb_grpc.FlipfixStub(open_channel(Connection(
            secured.address, token=tokens[tenant, "admin"])))

    north, south = stub("north"), stub("south")
    north.CreateProblem(pb.CreateProblemRequest(name="plan", model=convert.doc_to_model(SMALL)))
    north.AddCandidates(pb.AddCandidatesRequest(problem="plan", candidates=convert.candidates_to_batch(
        documents.parse_problem(SMALL), CANDS)))
    before = north.ListCandidates(pb.ListCandidatesRequest(problem="plan"))
    # south sees nothing, and every RPC on north's problem is NOT_FOUND, as for a name that
    # does not exist at all (same details)
    assert list(south.ListProblems(pb.ListProblemsRequest()).problems) == []
    calls = _every_rpc(south, "plan")
    ghost = _every_rpc(south, "no-such-problem")
    assert set(calls) | {"CreateProblem", "ListProblems"} == {
        m.name for m in pb.DESCRIPTOR.services_by_name["Flipfix"].methods}
    for rpc, call in calls.items():
        e = rpc_error(call)
        assert e.code() == grpc.StatusCode.NOT_FOUND, (rpc, e.code(), e.details())
        assert e.details() == rpc_error(ghost[rpc]).details().replace("no-such-problem", "plan")
    # south may use the same name for its own problem; north's is untouched
    south.CreateProblem(pb.CreateProblemRequest(name="plan", model=convert.doc_to_model(SMALL)))
    assert [p.name for p in north.ListProblems(pb.ListProblemsRequest()).problems] == ["plan"]
    assert north.GetProblem(pb.GetProblemRequest(name="plan")).info.num_candidates == 2
    assert north.ListCandidates(pb.ListCandidatesRequest(problem="plan")) == before
    south.DeleteProblem(pb.DeleteProblemRequest(name="plan"))
    assert north.GetProblem(pb.GetProblemRequest(name="plan")).info.revision == 1


def test_quotas_per_tenant_refuse_with_the_quota_named_and_store_nothing(secured, tokens):
    with _client(secured, tokens["north", "planner"]) as fx:
        for k in range(3):
            fx.create_problem(f"p{k}", SMALL)
        e = rpc_error(lambda: fx.create_problem("p3", SMALL))
        assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
        assert e.details().startswith("quota.problems: tenant 'north' would store 4 problems; "
                                      "the quota is 3")
        fx.add_candidates("p0", CANDS)
        fx.add_candidates("p1", CANDS)
        many = [{"id": f"z{k}", "assignment": {"a": 1, "b": 0, "c": 0}} for k in range(2)]
        e = rpc_error(lambda: fx.add_candidates("p2", many))
        assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED and "quota.candidates" in e.details()
        assert [i.num_candidates for i in fx.list_problems()] == [2, 2, 0]
    with _client(secured, tokens["south", "planner"]) as fx:  # quotas are per tenant
        for k in range(3):
            fx.create_problem(f"p{k}", SMALL)


def test_schema_2_database_is_migrated_to_tenants(tmp_path):
    """A schema-2 file (the layout before tenants, written out here) opens as schema 3:
    its problems belong to tenant '' with their stored bytes counted."""
    path = tmp_path / "v2.sqlite3"
    db = sqlite3.connect(path)
    db.executescript("""
        CREATE TABLE schema_version (version INTEGER NOT NULL);
        INSERT INTO schema_version VALUES (2);
        CREATE TABLE problems (name TEXT PRIMARY KEY, revision INTEGER NOT NULL,
            next_candidate INTEGER NOT NULL DEFAULT 1, created_at TEXT NOT NULL,
            updated_at TEXT NOT NULL);
        CREATE TABLE revisions (problem TEXT NOT NULL REFERENCES problems(name) ON DELETE CASCADE,
            revision INTEGER NOT NULL, model TEXT NOT NULL, num_variables INTEGER NOT NULL,
            num_interactions INTEGER NOT NULL, created_at TEXT NOT NULL,
            PRIMARY KEY (problem, revision));
        CREATE TABLE candidates (seq INTEGER PRIMARY KEY AUTOINCREMENT,
            problem TEXT NOT NULL REFERENCES problems(name) ON DELETE CASCADE, id TEXT NOT NULL,
            revision INTEGER NOT NULL, bits BLOB NOT NULL, source TEXT NOT NULL DEFAULT '',
            energy REAL, tags TEXT NOT NULL DEFAULT '[]', created_at TEXT NOT NULL,
            UNIQUE (problem, id));
        CREATE INDEX candidates_by_problem ON candidates(problem, seq);
    """)
    from flipfix.service.store import encode_model

    model = encode_model(documents.parse_problem(SMALL))
    db.execute("INSERT INTO problems VALUES ('old', 1, 3, 't', 't')")
    db.execute("INSERT INTO revisions VALUES ('old', 1, ?, 3, 2, 't')", (model,))
    db.execute("INSERT INTO candidates (problem, id, revision, bits, created_at) "
               "VALUES ('old', 'c1', 1, X'A0', 't'), ('old', 'c2', 1, X'40', 't')")
    db.commit()
    db.close()
    s = Store(path)
    assert s.schema_version == SCHEMA_VERSION == 3
    assert [i.name for i in s.list_problems()[0]] == ["old"]
    assert s.usage() == {"problems": 1, "candidates": 2, "bytes": len(model) + 2}
    assert s.list_problems(tenant="north")[0] == []
    recs, _ = s.list_candidates("old")
    assert [r.x.tolist() for r in recs] == [[1, 0, 1], [0, 1, 0]]
    con = sqlite3.connect(path)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert con.execute("PRAGMA foreign_key_check").fetchall() == []
    con.close()
    s.close()


def test_each_tenant_has_its_own_timeline(secured, tokens):
    """Two tenants with a problem of the same name: events, published plan and records of
    one are invisible to the other, and the history names the caller by token."""
    from flipfix.service.timeline_client import TimelineClient

    event = {"type": "fix", "name": "b stays off", "values": {"b": 0}}
    clients = {t: TimelineClient(secured.address, token=tokens[t, "planner"], timeout=30)
               for t in ("north", "south")}
    try:
        for fx in clients.values():
            fx.create_problem("p", SMALL)
            fx.add_candidates("p", CANDS)
        north, south = clients["north"], clients["south"]
        added = north.add_event("p", event)
        assert added["problem"] == "p" and added["added_by"] == "token north/planner"
        north.set_published_plan("p", "k1")
        north.repair("p", use_events=True, time_limit=0.5)
        assert [e["constraint"]["name"] for e in north.list_events("p")["events"]] == ["b stays off"]
        assert south.list_events("p")["events"] == []
        assert rpc_error(lambda: south.published_plan("p")).code() == grpc.StatusCode.NOT_FOUND
        assert len(north.list_records("p")) == 1 and south.list_records("p") == []
        assert north.list_records("p")[0]["problem"] == "p"
        # the other tenant cannot withdraw it by id either
        e = rpc_error(lambda: south.withdraw_event("p", added["id"]))
        assert e.code() == grpc.StatusCode.NOT_FOUND
    finally:
        for fx in clients.values():
            fx.close()
