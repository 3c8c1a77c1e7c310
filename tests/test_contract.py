"""The contract as a caller in another language sees it: structured error details, field
paths by position, one client error type, default and refused time limits, id rules,
reflection v1, enum replies, and the proto's own conventions (comments, enum zero values,
language options) checked from protoc's descriptors with source info.

Expected optima come from dimod's ExactSolver (brute force over every assignment).
"""

from __future__ import annotations

import functools
import re
import subprocess
import sys
from pathlib import Path

import dimod
import grpc
import numpy as np
import pytest
from google.protobuf import descriptor_pb2
from google.rpc import error_details_pb2
from grpc_reflection.v1alpha import reflection_pb2
from grpc_status import rpc_status

from flipfix.repair import CandidateSet, Problem
from flipfix.repair.errors import InputError
from flipfix.service import convert, errors
from flipfix.service.client import FlipfixClient, FlipfixError
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.server import SERVICE_NAME, create_server

from conftest import ROOT, rpc_error

DOC = {"vartype": "BINARY", "labels": ["a", "b", "zed_fri", "d"],
       "linear": {"a": -1.0, "b": -1.0, "zed_fri": 0.5, "d": -0.5},
       "quadratic": [["a", "b", 2.0], ["b", "zed_fri", -1.0], ["zed_fri", "d", 1.5]]}
CANDS = [{"id": "p0", "assignment": {"a": 1, "b": 0, "zed_fri": 0, "d": 1}},
         {"id": "p1", "assignment": {"a": 0, "b": 1, "zed_fri": 1, "d": 0}}]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("contract") / "flipfix.sqlite3"
    srv = create_server("127.0.0.1:0", db_path=str(db), workers=1, queue_size=2,
                        max_constraints=3)
    yield srv
    srv.shutdown(grace=1.0)


@pytest.fixture(scope="module")
def stub(server):
    ch = grpc.insecure_channel(server.address)
    yield pb_grpc.FlipfixStub(ch)
    ch.close()


@pytest.fixture(scope="module")
def problem(stub):
    from flipfix.repair.documents import forms as documents

    stub.CreateProblem(pb.CreateProblemRequest(name="c", model=convert.doc_to_model(DOC)))
    p = documents.parse_problem(DOC)
    stub.AddCandidates(pb.AddCandidatesRequest(problem="c",
                                               candidates=convert.candidates_to_batch(p, CANDS)))
    return p


def _details(err: grpc.RpcError) -> tuple[error_details_pb2.ErrorInfo, list]:
    """(ErrorInfo, [(field, description)] of the BadRequest) read from the status trailer."""
    status = rpc_status.from_call(err)
    assert status is not None, "no google.rpc.Status in the trailer"
    assert status.code == err.code().value[0] and status.message == err.details()
    info, bad, violations = error_details_pb2.ErrorInfo(), error_details_pb2.BadRequest(), []
    got_info = False
    for d in status.details:
        if d.Unpack(info):
            got_info = True
        elif d.Unpack(bad):
            violations = [(v.field, v.description) for v in bad.field_violations]
    assert got_info and info.domain == "flipfix.v1"
    return info, violations


def _repair(problem_name, *constraints, **options):
    return pb.RepairRequest(problem=problem_name, constraints=list(constraints),
                            options=pb.RepairOptions(**options))


def _fix(values) -> pb.Constraint:
    return pb.Constraint(fix=pb.FixVariables(values=convert.dict_to_assignment(values)))


# ------------------------------------------------------------------ rich errors
def test_invalid_field_carries_error_info_and_a_positional_field_violation(stub, problem):
    # a value of 3 for the label at position 1 of the fix: the path names the entry as sent
    bad = _fix({"a": 0, "zed_fri": 3})
    err = rpc_error(lambda: stub.Repair(_repair("c", bad, time_limit=1.0)))
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    info, violations = _details(err)
    assert info.reason == "INVALID_FIELD"
    assert info.metadata["field"] == "constraints[0].fix.values.values[1]"
    assert violations and violations[0][0] == "constraints[0].fix.values.values[1]"
    assert err.details().startswith("constraints[0].fix.values.values[1]: ")
    assert "zed_fri" not in violations[0][0]


def test_unknown_label_is_named_by_position_too(stub, problem):
    bad = pb.Constraint(extra=pb.ExtraTerms(linear=[
        pb.LinearTerm(label=convert.py_to_label("a"), bias=1.0),
        pb.LinearTerm(label=convert.py_to_label("nobody"), bias=1.0)]))
    err = rpc_error(lambda: stub.Repair(_repair("c", bad, time_limit=1.0)))
    info, violations = _details(err)
    assert info.metadata["field"] == "constraints[0].extra.linear[1]", err.details()
    assert violations[0][0] == "constraints[0].extra.linear[1]"


def test_model_and_decision_paths_are_positional(stub, problem):
    L = convert.py_to_label
    model = pb.ProblemModel(vartype=pb.VARTYPE_BINARY, labels=[L("a"), L("b")],
                            linear=[pb.LinearTerm(label=L("a"), bias=1.0),
                                    pb.LinearTerm(label=L("typo"), bias=1.0)])
    err = rpc_error(lambda: stub.CreateProblem(pb.CreateProblemRequest(name="m", model=model)))
    assert _details(err)[0].metadata["field"] == "model.linear[1]", err.details()
    model = convert.doc_to_model({
        "vartype": "BINARY", "labels": ["a", "b", "c", "d"],
        "decisions": [{"name": "s", "encoding": "one_hot", "variables": ["a", "b"], "values": [1, 2]},
                      {"name": "t", "encoding": "one_hot", "variables": ["c", "d"],
                       "values": ["x", "y"]}]})
    stub.CreateProblem(pb.CreateProblemRequest(name="decisions", model=model))
    batch = convert.arrays_to_batch([], np.array([[1, 0, 1, 0]], dtype=np.int8))
    stub.AddCandidates(pb.AddCandidatesRequest(problem="decisions", candidates=batch))
    change = pb.Constraint(decision_change=pb.DecisionChangePenalty(weight=1.0, reference=[
        pb.DecisionReference(decision="s", value=pb.DecisionValue(int=1)),
        pb.DecisionReference(decision="t", value=pb.DecisionValue(str="zz"))]))
    err = rpc_error(lambda: stub.Repair(_repair("decisions", change, time_limit=1.0)))
    info, violations = _details(err)
    assert info.metadata["field"] == "constraints[0].decision_change.reference[1]"
    assert violations[0][1] == "'zz' is not a value of decision 't' (its values: 'x', 'y')"


def test_messages_carry_no_numpy_or_python_reprs(stub, problem):
    inf = pb.Constraint(hamming=pb.HammingPenalty(
        reference=convert.dict_to_assignment({"a": 1}), weight=float("inf")))
    err = rpc_error(lambda: stub.Repair(_repair("c", inf, time_limit=1.0)))
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "np." not in err.details() and "float64" not in err.details(), err.details()
    info, _ = _details(err)
    assert info.metadata["field"] == "constraints[0].hamming.weight"
    # an unknown enum number: named, with the accepted values, not a Python repr
    err = rpc_error(lambda: stub.Repair(_repair("c", pb.Constraint(linear=pb.LinearConstraint(
        terms=[pb.LinearTerm(label=convert.py_to_label("a"), bias=1.0)], sense=7, rhs=0.0)))))
    assert err.details() == ("constraints[0].linear.sense: is 7, not a known value; must be "
                             "SENSE_LE, SENSE_EQ or SENSE_GE")
    assert "'?'" not in err.details()


def test_threshold_below_zero_is_refused(stub, problem):
    bad = pb.Constraint(hamming=pb.HammingPenalty(
        reference=convert.dict_to_assignment({"a": 1, "b": 1}), weight=1.0,
        shape=pb.PENALTY_SHAPE_THRESHOLD, threshold=-1.0))
    err = rpc_error(lambda: stub.Repair(_repair("c", bad, time_limit=1.0)))
    info, violations = _details(err)
    assert info.metadata["field"] == "constraints[0].hamming.threshold"
    assert violations[0][1] == "must be >= 0 for the threshold shape, got -1"


@pytest.mark.parametrize("call, code, reason, field", [
    (lambda s: s.GetProblem(pb.GetProblemRequest(name="nobody")), grpc.StatusCode.NOT_FOUND,
     "NOT_FOUND", "name"),
    (lambda s: s.CreateProblem(pb.CreateProblemRequest(name="c", model=convert.doc_to_model(DOC))),
     grpc.StatusCode.ALREADY_EXISTS, "ALREADY_EXISTS", "name"),
    (lambda s: s.ReplaceProblem(pb.ReplaceProblemRequest(name="c", model=convert.doc_to_model(DOC),
                                                         expected_revision=9)),
     grpc.StatusCode.FAILED_PRECONDITION, "STATE_CONFLICT", None),
    (lambda s: s.Repair(_repair("c", *[_fix({"a": 0})] * 4)), grpc.StatusCode.RESOURCE_EXHAUSTED,
     "LIMIT_EXCEEDED", "constraints"),
])
def test_every_status_has_its_reason(stub, problem, call, code, reason, field):
    err = rpc_error(lambda: call(stub))
    assert err.code() == code
    info, violations = _details(err)
    assert info.reason == reason
    if field is not None:
        assert info.metadata["field"] == field
    assert violations == []  # BadRequest only with INVALID_ARGUMENT


def test_reasons_are_the_proto_error_reason_values():
    """Every reason the server can send is an ErrorReason value name minus its prefix."""
    names = {pb.ErrorReason.Name(v).removeprefix("ERROR_REASON_")
             for v in pb.ErrorReason.values() if v}
    sent = ({r for _, _, r in errors._TABLE} | {"TRANSIENT", "INTERNAL"}
            | set(errors.INTERCEPTOR_REASONS))
    assert sent == names
    assert errors.fault_for(errors.QueueFullError("queue", "full")).reason == "QUEUE_FULL"
    assert errors.fault_for(RuntimeError("x")).reason == "INTERNAL"


# ------------------------------------------------------- the client's one error type
def test_client_raises_one_error_type_locally_and_from_the_server(server, problem):
    with FlipfixClient(server.address) as fx:
        with pytest.raises(FlipfixError) as local:  # a label typo, found before any call
            fx.repair("c", [{"type": "fix", "values": {"zed_fir": 1}}], time_limit=1.0)
        with pytest.raises(FlipfixError) as remote:  # a -1 in a BINARY fix, found by the server
            fx.repair("c", [_fix({"a": -1})], time_limit=1.0)
    for e in (local.value, remote.value):
        assert isinstance(e, grpc.RpcError)
        assert e.code() == grpc.StatusCode.INVALID_ARGUMENT and e.reason == "INVALID_FIELD"
    assert local.value.field.startswith("constraints[0].values")
    assert remote.value.field == "constraints[0].fix.values.values[0]"
    assert remote.value.violations[0][0] == remote.value.field


def test_client_error_type_on_streams_and_transport_failures(server, problem):
    with FlipfixClient(server.address) as fx:
        with pytest.raises(FlipfixError) as e:  # refused by the server, on the streaming RPC
            fx.repair("c", [_fix({"b": 5})], time_limit=1.0, on_progress=lambda p: None)
        assert e.value.reason == "INVALID_FIELD"
        assert e.value.field == "constraints[0].fix.values.values[0]"
    import socket

    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with FlipfixClient(f"127.0.0.1:{port}", timeout=2.0) as fx:
        with pytest.raises(FlipfixError) as e:
            fx.list_problems()
    assert e.value.code() == grpc.StatusCode.UNAVAILABLE and e.value.reason == ""


# ------------------------------------------------------------------ time limits
def test_time_limit_unset_is_the_stated_default_and_zero_is_refused(stub, problem, server):
    fix = _fix({"a": 0})
    r = stub.Repair(pb.RepairRequest(problem="c", constraints=[fix],
                                     options=pb.RepairOptions(method=pb.METHOD_GREEDY)))
    assert r.time_limit == 5.0  # the default the proto states (no deadline on this call)
    err = rpc_error(lambda: stub.Repair(_repair("c", fix, time_limit=0.0)))
    info, violations = _details(err)
    assert info.metadata["field"] == "options.time_limit"
    assert "> 0" in violations[0][1]
    err = rpc_error(lambda: stub.ParetoFront(pb.ParetoRequest(problem="c", time_limit=0.0)))
    assert _details(err)[0].metadata["field"] == "time_limit"
    with FlipfixClient(server.address) as fx:
        with pytest.raises(FlipfixError) as e:
            fx.repair("c", [fix], time_limit=0)
        assert e.value.field == "options.time_limit" and e.value.reason == "INVALID_FIELD"
        with pytest.raises(FlipfixError) as e:
            fx.stress_test("c", {"hamming_weight": 1.0}, time_limit=0)
        assert e.value.field == "time_limit"


def test_cli_refuses_time_limit_zero(tmp_path):
    out = subprocess.run([sys.executable, "-m", "flipfix.service.cli", "repair", "p.json",
                          "c.json", "k.json", "--time-limit", "0"],
                         capture_output=True, text=True, cwd=tmp_path)
    assert out.returncode == 2 and "--time-limit" in out.stderr and "> 0" in out.stderr


# ------------------------------------------------------------------------- ids
def test_ids_count_from_c0_on_every_path(stub, problem):
    """from_sampleset, AddCandidates and inline libraries all name row k of a first batch
    "c<k>"; an empty id list asks the server to assign every id."""
    X = np.array([[1, 0, 0, 1], [0, 1, 1, 0], [1, 1, 0, 0]], dtype=np.int8)
    ss = dimod.SampleSet.from_samples((X, list(problem.labels)), "BINARY", energy=[0, 0, 0])
    assert CandidateSet.from_sampleset(problem, ss).ids == ("c0", "c1", "c2")
    stub.CreateProblem(pb.CreateProblemRequest(name="ids", model=convert.doc_to_model(DOC)))
    batch = convert.arrays_to_batch([], X)
    assert list(batch.ids) == []
    got = stub.AddCandidates(pb.AddCandidatesRequest(problem="ids", candidates=batch))
    assert list(got.ids) == ["c0", "c1", "c2"]
    again = stub.AddCandidates(pb.AddCandidatesRequest(problem="ids", candidates=batch))
    assert list(again.ids) == ["c3", "c4", "c5"]
    r = stub.Repair(pb.RepairRequest(
        inline=pb.InlineLibrary(model=convert.doc_to_model(DOC), candidates=batch),
        options=pb.RepairOptions(method=pb.METHOD_GREEDY, time_limit=1.0)))
    assert [a.candidate_id for a in r.audit] and {a.candidate_id for a in r.audit} == {"c0", "c1", "c2"}
    # an empty batch is still refused, naming the count
    err = rpc_error(lambda: stub.AddCandidates(pb.AddCandidatesRequest(
        problem="ids", candidates=pb.CandidateBatch())))
    assert _details(err)[0].metadata["field"] == "candidates.values.count"


# ---------------------------------------------------------------------- replies
def test_reply_enums_and_solver_stages(stub, problem):
    """The optimum under a fix comes from brute force (dimod's ExactSolver)."""
    from flipfix.repair.documents import forms as documents

    batch = convert.candidates_to_batch(problem, CANDS)
    stub.CreateProblem(pb.CreateProblemRequest(name="enums", model=convert.doc_to_model(DOC)))
    stub.AddCandidates(pb.AddCandidatesRequest(problem="enums", candidates=batch))
    r = stub.Repair(pb.RepairRequest(problem="enums", constraints=[_fix({"a": 0})],
                                     options=pb.RepairOptions(method=pb.METHOD_CPSAT,
                                                              time_limit=5.0)))
    bqm = dimod.BinaryQuadraticModel(DOC["linear"], {(u, v): b for u, v, b in DOC["quadratic"]},
                                     0.0, "BINARY")
    best = min(d.energy for d in dimod.ExactSolver().sample(bqm).data(["sample", "energy"])
               if d.sample["a"] == 0)
    assert r.best.cost == pytest.approx(best)
    assert r.repair_status == pb.REPAIR_STATUS_OPTIMAL and r.method_used == pb.METHOD_CPSAT
    assert r.cpsat_outcome == pb.CPSAT_STATUS_OPTIMAL
    assert list(r.best.solvers) and all(s != pb.SOLVER_UNSPECIFIED for s in r.best.solvers)
    assert all(list(a.solvers) for a in r.audit)
    back = convert.reply_to_dict(r, documents.parse_problem(DOC))
    assert back["status"] == "optimal" and back["method"] == "cpsat"
    # the default method is the one METHOD_UNSPECIFIED documents: PORTFOLIO
    r = stub.Repair(pb.RepairRequest(problem="enums", options=pb.RepairOptions(time_limit=0.5)))
    assert r.method_used == pb.METHOD_PORTFOLIO


def test_solver_labels_round_trip():
    for label in ("greedy", "anneal+greedy", "greedy+cpsat", "anneal+greedy+cpsat", "unrepaired",
                  "unchanged", "cpsat"):
        assert convert.enums.proto_to_solvers(convert.enums.solvers_to_proto(label)) == label


# ------------------------------------------------------------------- reflection
def test_reflection_answers_v1_and_v1alpha(server):
    ch = grpc.insecure_channel(server.address)
    try:
        for path in ("/grpc.reflection.v1.ServerReflection/ServerReflectionInfo",
                     "/grpc.reflection.v1alpha.ServerReflection/ServerReflectionInfo"):
            call = ch.stream_stream(path,
                                    request_serializer=reflection_pb2.ServerReflectionRequest.SerializeToString,
                                    response_deserializer=reflection_pb2.ServerReflectionResponse.FromString)
            out = list(call(iter([
                reflection_pb2.ServerReflectionRequest(list_services=""),
                reflection_pb2.ServerReflectionRequest(file_containing_symbol=SERVICE_NAME)]),
                timeout=10))
            names = {s.name for s in out[0].list_services_response.service}
            assert {SERVICE_NAME, "grpc.reflection.v1.ServerReflection",
                    "grpc.reflection.v1alpha.ServerReflection"} <= names, path
            files = out[1].file_descriptor_response.file_descriptor_proto
            fd = descriptor_pb2.FileDescriptorProto.FromString(files[0])
            assert fd.package == "flipfix.v1"
    finally:
        ch.close()


# --------------------------------------------------------------- proto conventions
@functools.lru_cache(maxsize=1)
def _descriptor_set() -> descriptor_pb2.FileDescriptorSet:
    """Every .proto of proto/, compiled by protoc (grpcio-tools) with source info.

    protoc runs in a subprocess: its C++ protobuf runtime must not be loaded into a test
    process that has already loaded OR-Tools' (the process aborts)."""
    import tempfile

    protos = sorted(str(p.relative_to(ROOT / "proto")) for p in (ROOT / "proto").rglob("*.proto"))
    include = ("import sys; from importlib.resources import files; from grpc_tools import protoc; "
               "sys.exit(protoc.main(['protoc', '-I' + str(files('grpc_tools') / '_proto')] "
               "+ sys.argv[1:]))")
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "set.pb"
        run = subprocess.run([sys.executable, "-c", include, f"-I{ROOT / 'proto'}",
                              "--include_source_info", f"--descriptor_set_out={out}", *protos],
                             capture_output=True, text=True, timeout=120)
        assert run.returncode == 0, run.stderr
        return descriptor_pb2.FileDescriptorSet.FromString(out.read_bytes())


def _elements(fd):
    """(kind, name, path) of every commentable element of a file (paths as SourceCodeInfo)."""
    def messages(msgs, path, prefix):
        for i, m in enumerate(msgs):
            p = path + (i,)
            yield "message", prefix + m.name, p
            for j, f in enumerate(m.field):
                yield "field", f"{prefix}{m.name}.{f.name}", p + (2, j)
            for j, o in enumerate(m.oneof_decl):  # not the oneofs protoc makes for `optional`
                if not all(f.proto3_optional for f in m.field if f.HasField("oneof_index")
                           and f.oneof_index == j):
                    yield "oneof", f"{prefix}{m.name}.{o.name}", p + (8, j)
            yield from enums(m.enum_type, p + (4,), f"{prefix}{m.name}.")
            yield from messages(m.nested_type, p + (3,), f"{prefix}{m.name}.")

    def enums(es, path, prefix):
        for i, e in enumerate(es):
            yield "enum", prefix + e.name, path + (i,)
            for j, v in enumerate(e.value):
                yield "enum value", f"{prefix}{e.name}.{v.name}", path + (i, 2, j)

    yield from messages(fd.message_type, (4,), "")
    yield from enums(fd.enum_type, (5,), "")
    for i, s in enumerate(fd.service):
        yield "service", s.name, (6, i)
        for j, m in enumerate(s.method):
            yield "rpc", f"{s.name}.{m.name}", (6, i, 2, j)


def test_every_proto_element_has_a_comment_and_no_internal_reference():
    missing, cites = [], []
    for fd in _descriptor_set().file:
        comments = {tuple(loc.path): loc.leading_comments + loc.trailing_comments
                    for loc in fd.source_code_info.location}
        for kind, name, path in _elements(fd):
            text = comments.get(path, "").strip()
            if not text:
                missing.append(f"{fd.name}: {kind} {name}")
            if re.search(r"\b(issues?\s*#?\d+|README|DEVELOPERS)\b", text, re.I):
                cites.append(f"{fd.name}: {kind} {name}: {text[:60]}")
    assert not missing, missing
    assert not cites, cites


def test_enums_are_prefixed_and_their_zero_value_is_unspecified():
    bad = []
    for fd in _descriptor_set().file:
        def check(e, where):
            prefix = re.sub(r"(?<!^)(?=[A-Z])", "_", e.name).upper() + "_"
            if e.value[0].number != 0 or e.value[0].name != prefix + "UNSPECIFIED":
                bad.append(f"{where}{e.name}: zero value {e.value[0].name}")
            bad.extend(f"{where}{e.name}.{v.name}: not prefixed {prefix}" for v in e.value
                       if not v.name.startswith(prefix))

        for e in fd.enum_type:
            check(e, "")
        stack = list(fd.message_type)
        while stack:
            m = stack.pop()
            stack.extend(m.nested_type)
            for e in m.enum_type:
                check(e, m.name + ".")
    assert not bad, bad


def _fields(fd):
    """(message name, FieldDescriptorProto, comment) of every field of a file."""
    comments = {tuple(loc.path): loc.leading_comments + loc.trailing_comments
                for loc in fd.source_code_info.location}
    stack = [(m, (4, i), m.name) for i, m in enumerate(fd.message_type)]
    while stack:
        m, path, name = stack.pop()
        stack.extend((n, path + (3, i), f"{name}.{n.name}") for i, n in enumerate(m.nested_type))
        for j, f in enumerate(m.field):
            yield name, f, comments.get(path + (2, j), "")


def test_no_string_field_is_an_enum_in_disguise():
    # a comment that lists the values a string takes ("done", "time_limit" or "cancelled")
    listed = re.compile(r'"\w+"(?:, "\w+")* or "\w+"')
    bad = [f"{fd.name}: {m}.{f.name}: {c.strip()[:70]}" for fd in _descriptor_set().file
           for m, f, c in _fields(fd)
           if f.type == descriptor_pb2.FieldDescriptorProto.TYPE_STRING and listed.search(c)]
    assert not bad, bad


def test_every_requested_time_limit_is_optional():
    # unset means the stated default; an explicit 0 is refused, never read as "default"
    seen, bad = [], []
    for fd in _descriptor_set().file:
        for m, f, c in _fields(fd):
            if f.name == "time_limit" and m.endswith(("Request", "Options")):
                seen.append(f"{m}.{f.name}")
                if not f.proto3_optional or "unset:" not in c or "> 0" not in c:
                    bad.append(f"{fd.name}: {m}.{f.name}")
    assert {"RepairOptions.time_limit", "GrowRequest.time_limit"} <= set(seen)
    assert not bad, bad


def test_language_options_are_set_alike_in_every_file_of_the_package():
    seen = {}
    for fd in _descriptor_set().file:
        if not fd.package.startswith("flipfix."):
            continue
        o = fd.options
        opts = (o.java_package, o.java_multiple_files, o.go_package, o.csharp_namespace,
                o.objc_class_prefix, o.php_namespace, o.ruby_package)
        assert o.java_multiple_files and o.java_package and o.go_package and o.csharp_namespace, fd.name
        seen.setdefault(fd.package, set()).add(opts)
    assert seen and all(len(v) == 1 for v in seen.values()), seen


def test_auth_refusals_carry_error_info_and_reflection_v1_is_a_reader_method(tmp_path):
    from flipfix.service.token_cli import make_token

    path = str(tmp_path / "tokens.jsonl")
    reader = make_token(path, tenant="t", role="reader")
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "a.sqlite3"), warm=False,
                       workers=1, token_file=path) as srv:
        ch = grpc.insecure_channel(srv.address)
        stub = pb_grpc.FlipfixStub(ch)
        err = rpc_error(lambda: stub.ListProblems(pb.ListProblemsRequest()))
        info, violations = _details(err)
        assert err.code() == grpc.StatusCode.UNAUTHENTICATED
        assert (info.reason, info.metadata["field"]) == ("UNAUTHENTICATED", "authorization")
        assert violations == []
        auth_md = (("authorization", f"Bearer {reader}"),)
        err = rpc_error(lambda: stub.CreateProblem(pb.CreateProblemRequest(
            name="x", model=convert.doc_to_model(DOC)), metadata=auth_md))
        assert err.code() == grpc.StatusCode.PERMISSION_DENIED
        assert _details(err)[0].reason == "PERMISSION_DENIED"
        call = ch.stream_stream("/grpc.reflection.v1.ServerReflection/ServerReflectionInfo",
                                request_serializer=reflection_pb2.ServerReflectionRequest.SerializeToString,
                                response_deserializer=reflection_pb2.ServerReflectionResponse.FromString)
        out = list(call(iter([reflection_pb2.ServerReflectionRequest(list_services="")]),
                        metadata=auth_md, timeout=10))
        assert SERVICE_NAME in {s.name for s in out[0].list_services_response.service}
        ch.close()
