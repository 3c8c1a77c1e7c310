"""The contract: generated code is fresh, conversions are exact, the core stays grpc-free."""

from __future__ import annotations

import itertools
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
GENERATED = ROOT / "service" / "generated"

# lines that only stamp the generator's version (they differ between grpcio-tools patch releases)
_STAMP = re.compile(r"^(GRPC_GENERATED_VERSION = .*|\s+\d+,)$")


def _normalised(text: str) -> list[str]:
    return [line for line in text.splitlines() if not _STAMP.match(line)]


def test_committed_generated_code_is_not_stale(tmp_path):
    pytest.importorskip("grpc_tools")
    out = tmp_path / "gen"
    subprocess.run([sys.executable, str(ROOT / "scripts" / "generate_proto.py"), "--out", str(out)],
                   check=True, capture_output=True)
    fresh = sorted(p.name for p in out.iterdir() if p.is_file())
    committed = sorted(p.name for p in GENERATED.iterdir() if p.is_file())
    assert fresh == committed
    for name in fresh:
        assert _normalised((out / name).read_text()) == _normalised((GENERATED / name).read_text()), (
            f"service/generated/{name} is stale: run `make proto` (scripts/generate_proto.py)")


def test_generation_is_deterministic(tmp_path):
    pytest.importorskip("grpc_tools")
    for d in ("a", "b"):
        subprocess.run([sys.executable, str(ROOT / "scripts" / "generate_proto.py"),
                        "--out", str(tmp_path / d)], check=True, capture_output=True)
    for p in (tmp_path / "a").iterdir():
        assert p.read_bytes() == (tmp_path / "b" / p.name).read_bytes()


def test_generated_imports_are_package_relative():
    text = (GENERATED / "flipfix_pb2_grpc.py").read_text()
    assert "from . import flipfix_pb2" in text
    assert not re.search(r"^import flipfix_pb2", text, flags=re.M)


def test_core_never_imports_grpc_or_protobuf():
    code = ("import sys, repair, flipfix.repair.api, flipfix.repair.documents.forms, flipfix.repair.lowering.compiled\n"
            "bad = [m for m in sys.modules if m.split('.')[0] in ('grpc', 'grpc_tools')]\n"
            "assert not bad, bad\n")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT)


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_model_round_trip_keeps_every_energy(vartype):
    from flipfix.repair.documents import forms as documents
    from flipfix.service import convert

    doc = {"vartype": vartype, "linear": {"0": 0.5, "b": -1.0, "c": 2.0},
           "quadratic": [[0, "b", 1.5], ["b", "c", -0.75], [0, 9, 2.0]], "offset": -0.25}
    p = documents.parse_problem(doc)
    for model in (convert.doc_to_model(doc), convert.problem_to_model(p)):
        q = convert.model_to_problem(type(model).FromString(model.SerializeToString()))
        assert q.labels == p.labels and q.vartype == p.vartype
        X = np.array(list(itertools.product((0, 1), repeat=p.n)), dtype=np.int8)
        np.testing.assert_allclose(q.energies(X), p.energies(X), atol=1e-12)


def test_constraint_documents_convert_to_the_same_domain_objects():
    from flipfix.repair.documents import forms as documents
    from flipfix.service import convert

    p = documents.parse_problem({"vartype": "SPIN", "quadratic": [[0, 1, 1.0], [1, "z", 1.0]]})
    docs = [
        {"type": "hamming", "reference": {"0": 1, "1": -1}, "weight": 2.5, "shape": "table",
         "table": [0, 1, 5], "name": "keep"},
        {"type": "extra", "linear": {"z": 1.0}, "quadratic": [[0, "z", -2.0]], "offset": 1.0},
        {"type": "fix", "values": {"z": -1}},
        {"type": "linear", "terms": {"0": 1, "z": 2}, "sense": ">=", "rhs": 1},
        {"type": "forbid", "assignment": {"0": 1, "1": 1}},
    ]
    direct = documents.parse_constraints(docs, p)
    via_proto = convert.constraints_to_domain(convert.docs_to_constraints(docs, p))
    assert [type(c) for c in via_proto] == [type(c) for c in direct]
    for a, b in zip(direct, via_proto):
        for attr in ("reference", "weight", "shape", "table", "values", "terms", "sense", "rhs",
                     "assignment", "linear", "offset", "name"):
            if hasattr(a, attr):
                va, vb = getattr(a, attr), getattr(b, attr)
                assert (list(va) if isinstance(va, (list, tuple)) else va) == (
                    list(vb) if isinstance(vb, (list, tuple)) else vb), attr


def test_constraint_errors_use_proto_field_names():
    from flipfix.repair.documents import forms as documents
    from flipfix.repair.errors import InputError
    from flipfix.service import convert
    from flipfix.service.generated import flipfix_pb2 as pb

    p = documents.parse_problem({"vartype": "BINARY", "quadratic": [["a", "b", 1.0]]})
    good = pb.Constraint(fix=pb.FixVariables(values=convert.dict_to_assignment({"a": 1})))
    bad = pb.Constraint(hamming=pb.HammingPenalty(reference=convert.dict_to_assignment({"a": 1}),
                                                  weight=-2.0))
    with pytest.raises(InputError) as e:
        convert.constraints_to_domain([good, bad])
    assert e.value.field == "constraints[1].hamming.weight"
    unknown = pb.Constraint(forbid=pb.ForbidAssignment(assignment=convert.dict_to_assignment({"q": 1})))
    with pytest.raises(InputError) as e:
        convert.constraints_to_compiled([unknown], p)
    assert e.value.field.startswith("constraints[0].")


@pytest.mark.parametrize("n", [1, 7, 8, 9, 13, 64])
def test_packed_layout_is_numpy_packbits_msb_first(n):
    """The proto's PackedAssignments layout, checked bit by bit against its written rule
    (bit 7 - j % 8 of byte j // 8 of the row) and against numpy.packbits."""
    from flipfix.service import packing

    rng = np.random.default_rng(n)
    X = rng.integers(0, 2, size=(5, n), dtype=np.int8)
    bits = packing.pack_rows(X)
    rb = (n + 7) // 8
    assert len(bits) == 5 * rb and bits == np.packbits(X.astype(np.uint8), axis=1).tobytes()
    for k in range(5):
        for j in range(n):
            assert (bits[k * rb + j // 8] >> (7 - j % 8)) & 1 == X[k, j]
    np.testing.assert_array_equal(packing.unpack_rows(bits, 5, n), X)


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_packed_values_mean_the_vartype_values(vartype):
    """Bit 1 is value 1 (BINARY) or +1 (SPIN), bit 0 is 0 or -1: the energies of the
    unpacked candidates equal dimod's energies of the same samples (label-keyed)."""
    import dimod

    from flipfix.repair.documents import forms as documents
    from flipfix.service import convert

    doc = {"vartype": vartype, "linear": {"a": 0.5, "b": -1.0, "c": 0.25},
           "quadratic": [["a", "b", 1.5], ["b", "c", -0.75]], "offset": 0.5}
    p = documents.parse_problem(doc)
    lo = -1 if vartype == "SPIN" else 0
    vals = np.array(list(itertools.product((lo, 1), repeat=3)), dtype=np.int8)
    cands = [{"id": f"k{i}", "assignment": dict(zip(p.labels, map(int, v)))} for i, v in enumerate(vals)]
    batch = convert.candidates_to_batch(p, cands)
    ids, X, _ = convert.batch_to_arrays(p, type(batch).FromString(batch.SerializeToString()))
    bqm = dimod.BinaryQuadraticModel(doc["linear"], {(u, v): b for u, v, b in doc["quadratic"]},
                                     doc["offset"], vartype)
    want = [bqm.energy(c["assignment"]) for c in cands]  # dimod's own energy, label-keyed
    np.testing.assert_allclose(p.energies(X), want, atol=1e-12)
    assert ids == [c["id"] for c in cands]


def test_indexed_model_errors_name_the_field():
    from flipfix.repair.errors import InputError
    from flipfix.service import convert
    from flipfix.service.generated import flipfix_pb2 as pb

    def model(**kw):
        m = pb.ProblemModel(vartype=pb.VARTYPE_BINARY, labels=[convert.py_to_label(x) for x in "abc"])
        m.indexed.CopyFrom(pb.IndexedTerms(**{"linear": [1.0, 2.0, 3.0], "u": [0], "v": [1],
                                              "bias": [0.5], **kw}))
        return m

    cases = [({"u": [3]}, "model.indexed.u[0]"), ({"v": [0]}, "model.indexed.u[0]"),
             ({"linear": [1.0]}, "model.indexed.linear"), ({"bias": [1.0, 2.0]}, "model.indexed.bias"),
             ({"bias": [float("inf")]}, "model.indexed.bias[0]")]
    for kw, field in cases:
        with pytest.raises(InputError) as e:
            convert.model_to_problem(model(**kw))
        assert e.value.field == field, (kw, e.value.field)
    both = model()
    both.linear.append(pb.LinearTerm(label=convert.py_to_label("a"), bias=1.0))
    with pytest.raises(InputError) as e:
        convert.model_to_problem(both)
    assert e.value.field == "model.indexed"
    nolabels = model()
    del nolabels.labels[:]
    with pytest.raises(InputError) as e:
        convert.model_to_problem(nolabels)
    assert e.value.field == "model.labels"
