"""Malformed inputs, many of them: every one is refused cleanly, naming its field.

* gRPC: mutations of valid requests (hypothesis draws the class of fault, where it goes
  and the bad value) sent to a real server on loopback; each must be INVALID_ARGUMENT
  with details starting with the expected field path (never INTERNAL or UNKNOWN), and
  the store must be unchanged afterwards (same SQL dump).
* CLI: malformed JSON files given to ``flipfix repair``; each must exit 2 with one line
  ``flipfix: FILE: FIELD: ...`` and no traceback.

Enum values are written as numbers (their names are the contract's, not these tests').
"""

from __future__ import annotations

import json
import math
import sqlite3
import subprocess
import sys

import grpc
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from flipfix.repair.documents import forms as documents
from flipfix.service import convert
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.server import create_server

SMALL = {"vartype": "BINARY",
         "linear": {"a": -1.0, "b": -1.0, "c": -1.0, "d": 0.5, "e": -0.5},
         "quadratic": [["a", "b", 2.0], ["b", "c", 2.0], ["c", "d", -1.5], ["d", "e", 1.0]],
         "offset": 0.0}
LABELS = ["a", "b", "c", "d", "e"]
CANDS = [{"id": "k1", "assignment": {"a": 1, "b": 0, "c": 1, "d": 1, "e": 1}},
         {"id": "k2", "assignment": {"a": 0, "b": 1, "c": 0, "d": 0, "e": 0}}]
BAD_FLOATS = st.sampled_from([math.nan, math.inf, -math.inf])
UNKNOWN = st.text(alphabet="xyz0123456789_", min_size=2, max_size=8).filter(
    lambda s: s not in LABELS)
TABLE, LE = 4, 1  # PenaltyShape TABLE, Sense LE


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("fuzz") / "flipfix.sqlite3"
    srv = create_server("127.0.0.1:0", db_path=str(db), workers=1, queue_size=2,
                        max_variables=50, max_constraints=8, max_candidates=20, warm=False)
    srv.db = db
    yield srv
    srv.shutdown(grace=1.0)


@pytest.fixture(scope="module")
def stub(server):
    ch = grpc.insecure_channel(server.address)
    stub = pb_grpc.FlipfixStub(ch)
    stub.CreateProblem(pb.CreateProblemRequest(name="small", model=convert.doc_to_model(SMALL)))
    p = documents.parse_problem(SMALL)
    stub.AddCandidates(pb.AddCandidatesRequest(problem="small",
                                               candidates=convert.candidates_to_batch(p, CANDS)))
    yield stub
    ch.close()


def _dump(db) -> list[str]:
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return list(con.iterdump())
    finally:
        con.close()


def _valid_repair() -> pb.RepairRequest:
    p = documents.parse_problem(SMALL)
    fix = pb.Constraint(fix=pb.FixVariables(values=convert.dict_to_assignment({"a": 0})))
    return pb.RepairRequest(inline=pb.InlineLibrary(model=convert.doc_to_model(SMALL),
                                                    candidates=convert.candidates_to_batch(p, CANDS)),
                            constraints=[fix], options=pb.RepairOptions(time_limit=0.2))


# --------------------------------------------------------------- mutations
# each: (data) -> (rpc name, request, expected start of the details)
def _m_bias(data):
    r = _valid_repair()
    k = data.draw(st.integers(0, len(r.inline.model.linear) - 1))
    r.inline.model.linear[k].bias = data.draw(BAD_FLOATS)
    return "Repair", r, f"inline.model.linear[{k}].bias"


def _m_quad_bias(data):
    r = _valid_repair()
    k = data.draw(st.integers(0, len(r.inline.model.quadratic) - 1))
    r.inline.model.quadratic[k].bias = data.draw(BAD_FLOATS)
    return "Repair", r, f"inline.model.quadratic[{k}].bias"


def _m_self_loop(data):
    r = _valid_repair()
    k = data.draw(st.integers(0, len(r.inline.model.quadratic) - 1))
    r.inline.model.quadratic[k].v.CopyFrom(r.inline.model.quadratic[k].u)
    return "Repair", r, f"inline.model.quadratic[{k}]"


def _m_vartype(data):
    r = _valid_repair()
    r.inline.model.vartype = data.draw(st.sampled_from([0, 3, 7, 99, 2**20]))
    return "Repair", r, "inline.model.vartype"


def _m_offset(data):
    r = _valid_repair()
    r.inline.model.offset = data.draw(BAD_FLOATS)
    return "Repair", r, "inline.model.offset"


def _m_empty_model(data):
    r = _valid_repair()
    r.inline.model.Clear()
    r.inline.model.vartype = 1
    return "Repair", r, "inline.model"


def _m_bits_length(data):
    r = _valid_repair()
    extra = data.draw(st.binary(min_size=1, max_size=4))
    r.inline.candidates.values.bits += extra
    return "Repair", r, "inline.candidates"


def _m_count(data):
    r = _valid_repair()
    r.inline.candidates.values.count = data.draw(st.sampled_from([0, 1, 3, 1000, 2**32 - 1]))
    return "Repair", r, "inline.candidates"


def _m_num_variables(data):
    r = _valid_repair()
    r.inline.candidates.values.num_variables = data.draw(
        st.integers(0, 2**32 - 1).filter(lambda v: v != 5))
    return "Repair", r, "inline.candidates"


def _m_duplicate_ids(data):
    r = _valid_repair()
    r.inline.candidates.ids[1] = r.inline.candidates.ids[0]
    return "Repair", r, "inline.candidates.ids"


def _m_time_limit(data):
    r = _valid_repair()
    r.options.time_limit = data.draw(st.one_of(BAD_FLOATS, st.floats(max_value=-1e-9,
                                                                     allow_nan=False)))
    return "Repair", r, "options.time_limit"


def _m_flip_price(data):
    r = _valid_repair()
    r.options.flip_price = data.draw(st.one_of(BAD_FLOATS, st.floats(max_value=-1e-9,
                                                                     allow_nan=False)))
    return "Repair", r, "options.flip_price"


def _m_seed(data):
    r = _valid_repair()
    r.options.seed = data.draw(st.integers(2**31, 2**64 - 1))
    return "Repair", r, "options.seed"


def _m_workers(data):
    r = _valid_repair()
    r.options.workers = data.draw(st.integers(65, 2**32 - 1))
    return "Repair", r, "options.workers"


def _m_max_flips_negative(data):
    """A negative max_flips sent as int32 by a client that did not check it (raw varint)."""
    r = _valid_repair()
    r.options.ClearField("max_flips")
    neg = data.draw(st.integers(-2**31, -1))
    raw = r.SerializeToString()
    # RepairRequest.options (field 6) gets a max_flips (field 3) varint of the negative int
    inner = bytes([3 << 3]) + _varint(neg & (2**64 - 1))
    opts = r.options.SerializeToString() + inner
    raw = pb.RepairRequest(inline=r.inline, constraints=r.constraints).SerializeToString() \
        + bytes([6 << 3 | 2]) + _varint(len(opts)) + opts
    return "Repair", pb.RepairRequest.FromString(raw), "options.max_flips"


def _varint(v: int) -> bytes:
    out = bytearray()
    while True:
        b = v & 0x7F
        v >>= 7
        if v:
            out.append(b | 0x80)
        else:
            out.append(b)
            return bytes(out)


def _m_method(data):
    r = _valid_repair()
    r.options.method = data.draw(st.integers(4, 1000))
    return "Repair", r, "options.method"


def _m_fix_unknown(data):
    r = _valid_repair()
    r.constraints[0].fix.values.values[0].label.str = data.draw(UNKNOWN)
    return "Repair", r, "constraints[0].fix"


def _m_fix_value(data):
    r = _valid_repair()
    r.constraints[0].fix.values.values[0].value = data.draw(
        st.integers(-2**31, 2**31 - 1).filter(lambda v: v not in (0, 1)))
    return "Repair", r, "constraints[0].fix"


def _m_no_kind(data):
    r = _valid_repair()
    r.constraints.add(name=data.draw(st.text(max_size=5)))
    return "Repair", r, "constraints[1]"


def _m_table(data):
    r = _valid_repair()
    h = pb.HammingPenalty(reference=convert.dict_to_assignment({"a": 1}), weight=1.0, shape=TABLE)
    r.constraints.append(pb.Constraint(hamming=h))
    return "Repair", r, "constraints[1].hamming.table"


def _m_hamming_weight(data):
    r = _valid_repair()
    h = pb.HammingPenalty(reference=convert.dict_to_assignment({"a": 1}),
                          weight=data.draw(st.one_of(BAD_FLOATS, st.floats(max_value=-1e-9,
                                                                           allow_nan=False))))
    r.constraints.append(pb.Constraint(hamming=h))
    return "Repair", r, "constraints[1].hamming.weight"


def _m_linear_sense(data):
    r = _valid_repair()
    lc = pb.LinearConstraint(terms=[pb.LinearTerm(label=pb.Label(str="a"), bias=1.0)],
                             sense=data.draw(st.sampled_from([0, 9, 1234])), rhs=1.0)
    r.constraints.append(pb.Constraint(linear=lc))
    return "Repair", r, "constraints[1].linear.sense"


def _m_linear_rhs(data):
    r = _valid_repair()
    lc = pb.LinearConstraint(terms=[pb.LinearTerm(label=pb.Label(str="a"), bias=1.0)],
                             sense=LE, rhs=data.draw(BAD_FLOATS))
    r.constraints.append(pb.Constraint(linear=lc))
    return "Repair", r, "constraints[1].linear.rhs"


def _m_too_many_constraints(data):
    r = _valid_repair()
    for _ in range(data.draw(st.integers(8, 12))):
        r.constraints.append(r.constraints[0])
    return "Repair", r, "constraints"


def _m_no_library(data):
    r = _valid_repair()
    r.ClearField("inline")
    return "Repair", r, "library"


def _m_create_name(data):
    name = data.draw(st.sampled_from(["", " ", "x" * 300, "\x00", "é\n", "a\u200bb", "tab\there"]))
    return "CreateProblem", pb.CreateProblemRequest(name=name, model=convert.doc_to_model(SMALL)), \
        "name"


def _m_create_bias(data):
    m = convert.doc_to_model(SMALL)
    k = data.draw(st.integers(0, len(m.linear) - 1))
    m.linear[k].bias = data.draw(BAD_FLOATS)
    return "CreateProblem", pb.CreateProblemRequest(name="fresh", model=m), \
        f"model.linear[{k}].bias"


def _m_create_indexed(data):
    m = pb.ProblemModel(vartype=1, labels=[pb.Label(str=x) for x in LABELS])
    m.indexed.linear.extend([0.0] * 5)
    u = data.draw(st.integers(5, 2**32 - 1))
    m.indexed.u.append(u)
    m.indexed.v.append(0)
    m.indexed.bias.append(1.0)
    return "CreateProblem", pb.CreateProblemRequest(name="fresh", model=m), "model.indexed.u"


def _m_create_empty(data):
    return "CreateProblem", pb.CreateProblemRequest(name="fresh", model=pb.ProblemModel(vartype=1)), \
        "model"


def _m_add_bits(data):
    p = documents.parse_problem(SMALL)
    b = convert.candidates_to_batch(p, CANDS)
    b.ids[:] = ["n1", "n2"]
    b.values.bits = data.draw(st.binary(max_size=8).filter(lambda x: len(x) != 2))
    return "AddCandidates", pb.AddCandidatesRequest(problem="small", candidates=b), "candidates"


def _m_stress_family(data):
    return "StressTest", pb.StressRequest(problem="small", scenarios=2), "family"


def _m_stress_seed_ids(data):
    r = pb.StressRequest(problem="small", scenarios=2, candidate_ids=["k1", "k1"])
    r.family.fix_k = 1
    return "StressTest", r, "candidate_ids[1]"


def _m_robust_eps(data):
    r = pb.RobustnessRequest(problem="small", epsilon=data.draw(
        st.one_of(BAD_FLOATS, st.floats(max_value=-1e-9, allow_nan=False))))
    return "ProfileRobustness", r, "epsilon"


MUTATIONS = [_m_bias, _m_quad_bias, _m_self_loop, _m_vartype, _m_offset, _m_empty_model,
             _m_bits_length, _m_count, _m_num_variables, _m_duplicate_ids, _m_time_limit,
             _m_flip_price, _m_seed, _m_workers, _m_max_flips_negative, _m_method,
             _m_fix_unknown, _m_fix_value, _m_no_kind, _m_table, _m_hamming_weight,
             _m_linear_sense, _m_linear_rhs, _m_too_many_constraints, _m_no_library,
             _m_create_name, _m_create_bias, _m_create_indexed, _m_create_empty, _m_add_bits,
             _m_stress_family, _m_stress_seed_ids, _m_robust_eps]

#: Over a configured size limit: RESOURCE_EXHAUSTED (documented), still naming the field.
OVER_LIMIT = {_m_too_many_constraints}
SEEN: dict[str, int] = {}


@settings(max_examples=200, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.data())
def test_malformed_grpc_requests_are_invalid_argument(server, stub, data):
    mutate = data.draw(st.sampled_from(MUTATIONS), label="mutation")
    rpc, request, field = mutate(data)
    before = _dump(server.db)
    with pytest.raises(grpc.RpcError) as e:
        getattr(stub, rpc)(request, timeout=30)
    err = e.value
    expected = (grpc.StatusCode.RESOURCE_EXHAUSTED if mutate in OVER_LIMIT
                else grpc.StatusCode.INVALID_ARGUMENT)
    assert err.code() == expected, (mutate.__name__, err.code(), err.details())
    assert err.details().startswith(field), (mutate.__name__, err.details())
    assert _dump(server.db) == before
    SEEN[mutate.__name__] = SEEN.get(mutate.__name__, 0) + 1


def test_every_mutation_class_was_sent():
    """The property above ran every class of fault (run in this file's order)."""
    if not SEEN:
        pytest.skip("run together with the property test")
    assert set(SEEN) == {m.__name__ for m in MUTATIONS}
    assert sum(SEEN.values()) >= 150


# --------------------------------------------------------------- CLI files
GOOD = {"problem": json.dumps(SMALL), "candidates": json.dumps(CANDS), "constraints": "[]"}

CLI_CASES = [
    # (which file, its text, expected start of the field in the message)
    ("problem", "[" * 100_000 + "]" * 100_000, "problem"),
    ("constraints", "[" * 5000 + "]" * 5000, "constraints"),
    ("candidates", '[{"id": "k", "assignment": ' + "{\"a\": " * 3000 + "1" + "}" * 3000 + "}]",
     "candidates"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": ' + "9" * 5000 + "}}", "problem.linear"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": -' + "1" * 30 + "}}", "problem.linear"),
    ("problem", '{"vartype": "BINARY", "offset": ' + "7" * 100 + "}", "problem.offset"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": 1, "a": 2}}', "problem.linear"),
    ("problem", '{"vartype": "BINARY", "vartype": "SPIN", "linear": {"a": 1}}', "problem.vartype"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": NaN}}', "problem.linear"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": Infinity}}', "problem.linear"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": -Infinity}}', "problem.linear"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": 1e999}}', "problem.linear"),
    ("problem", '{"vartype": "BINARY"}', "problem"),
    ("problem", '{"vartype": "BINARY", "linear": {}, "quadratic": []}', "problem"),
    ("problem", '{"vartype": "TERNARY", "linear": {"a": 1}}', "problem.vartype"),
    ("problem", '{"linear": {"a": 1}}', "problem.vartype"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": "x"}}', "problem.linear"),
    ("problem", '{"vartype": "BINARY", "linear": [1, 2]}', "problem.linear"),
    ("problem", '{"vartype": "BINARY", "quadratic": [["a", "a", 1]]}', "problem.quadratic[0]"),
    ("problem", '{"vartype": "BINARY", "quadratic": [["a", "b"]]}', "problem.quadratic[0]"),
    ("problem", '{"vartype": "BINARY", "quadratic": [["a", true, 1]]}', "problem.quadratic[0]"),
    ("problem", '{"vartype": "BINARY", "quadratic": {"a": 1}}', "problem.quadratic"),
    ("problem", '{"vartype": "BINARY", "linear": {"a": 1}, "colour": 3}', "problem"),
    ("problem", '{"vartype": "BINARY", "labels": ["a", "a"], "linear": {"a": 1}}',
     "problem.labels[1]"),
    ("problem", "[]", "problem"),
    ("problem", "", "problem"),
    ("problem", "{", "problem"),
    ("problem", '{"vartype": "BINARY",}', "problem"),
    ("problem", b"\xff\xfe", "problem"),
    ("candidates", "{}", "candidates"),
    ("candidates", '[{"id": "k1", "assignment": {"a": 2}}]', "candidates[0].assignment"),
    ("candidates", '[{"id": "k1", "assignment": {"zz": 1}}]', "candidates[0].assignment"),
    ("candidates", '[{"id": "k1", "assignment": {"a": 1}, "id": "k2"}]', "candidates[0].id"),
    ("candidates", '[{"id": "k1", "assignment": {"a": ' + "1" * 40 + "}}]",
     "candidates[0].assignment"),
    ("candidates", '[{"id": "k1", "assignment": {"a": 1, "b": 0, "c": 1, "d": 1, "e": 1}},'
                   ' {"id": "k1", "assignment": {"a": 1, "b": 0, "c": 1, "d": 1, "e": 1}}]',
     "candidates"),
    ("constraints", '{"type": "fix"}', "constraints"),
    ("constraints", '[{"type": "teleport"}]', "constraints[0]"),
    ("constraints", '[{"type": "fix", "values": {"zz": 1}}]', "constraints[0]"),
    ("constraints", '[{"type": "hamming", "reference": {"a": 1}, "shape": "table"}]',
     "constraints[0].table"),
    ("constraints", '[{"type": "hamming", "reference": {"a": 1}, "weight": -1}]',
     "constraints[0]"),
    ("constraints", '[{"type": "linear", "terms": {"a": 1}, "sense": "<>", "rhs": 1}]',
     "constraints[0]"),
    ("constraints", '[{"type": "fix", "values": {"a": 1}, "type": "forbid"}]', "constraints[0].type"),
    ("constraints", '[{"type": "linear", "terms": {"a": 1}, "sense": "<=", "rhs": '
                    + "5" * 25 + "}]", "constraints[0].rhs"),
]


@pytest.mark.parametrize("which,text,field", CLI_CASES,
                         ids=[f"{k}-{c[0]}" for k, c in enumerate(CLI_CASES)])
def test_malformed_cli_files_give_one_line(tmp_path, which, text, field):
    files = {}
    for name, good in GOOD.items():
        body = text if name == which else good
        files[name] = tmp_path / f"{name}.json"
        files[name].write_bytes(body if isinstance(body, bytes) else body.encode("utf-8"))
    out = subprocess.run([sys.executable, "-m", "flipfix.service.cli", "repair",
                          str(files["problem"]), str(files["candidates"]),
                          str(files["constraints"]), "--quiet", "--time-limit", "0.2"],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 2, out.stderr
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in out.stderr, out.stderr
    assert lines[0].startswith(f"flipfix: {files[which]}: {field}"), lines[0]


def test_cli_option_errors_are_one_line():
    out = subprocess.run([sys.executable, "-m", "flipfix.service.cli", "repair", "p", "c", "k",
                          "--time-limit", "-1"], capture_output=True, text=True, timeout=60)
    assert out.returncode == 2
    assert out.stderr.strip().splitlines() == [
        "flipfix repair: argument --time-limit: must be > 0, got -1"]
