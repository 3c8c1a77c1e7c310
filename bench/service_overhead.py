"""Service overhead: the same repair through gRPC (loopback) versus in-process.

K=1000 candidates of the n=1000 sparse model, scenario (a) (10 variables forced).
Two methods: ``greedy`` (little compute, so the overhead shows) and ``portfolio`` at 1 s.
The in-process baseline calls ``flipfix.repair.repair`` with the same options the server uses
(CP-SAT workers=1). Serialisation share: client-side request building (domain -> proto) and
encoding, server-side decoding and conversion (proto -> domain), reply building, timed
separately with the service's own converters. Target (issue 6): service/in-process < 1.5x.
Candidates travel packed (``CandidateBatch``: one bit per variable, ids, no per-bit messages).
The largest accepted request under the default ``ServerConfig`` limits is computed from the
measured bytes per candidate and, in the full run, checked by sending it and one candidate more.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np

from flipfix.repair import CandidateSet, repair
from flipfix.repair.model.constraints import FixVariables

from bench.common import build_library, load_instance, table

__all__ = ["run", "render", "available"]

TARGET = 1.5
COLUMNS = ["case", "in-process s", "service s", "ratio", "request MB", "client encode s",
           "server decode s", "reply s", "serialisation share", "target"]


def available() -> bool:
    root = Path(__file__).resolve().parent.parent / "service"
    return (root / "server.py").exists() and (root / "client.py").exists()


def _timed(fn, repeat=1):
    best = None
    out = None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        dt = time.perf_counter() - t
        best = dt if best is None else min(best, dt)
    return out, best


def run(*, quick: bool = False, seed: int = 0, log=print) -> dict:
    if not available():
        return {"rows": [], "columns": COLUMNS,
                "note": "service/server.py or service/client.py missing: not measured"}
    from flipfix.service import convert
    from flipfix.service.client import FlipfixClient
    from flipfix.service.generated import flipfix_pb2 as pb
    from flipfix.service.server import ServerConfig, create_server

    inst = load_instance("rand1000", seed=seed)
    p = inst.problem
    K = 200 if quick else 1000
    rng = np.random.default_rng(seed)
    lib = build_library(inst, size=K, seed=seed)
    cands = CandidateSet.from_array(p, lib)
    pick = rng.choice(p.n, size=10, replace=False)
    fix_values = {int(i): int(1 - lib[0, i]) for i in pick}
    dom = [FixVariables(fix_values, name="forced")]
    doc = [{"type": "fix", "name": "forced", "values": {str(k): v for k, v in fix_values.items()}}]
    rows = []
    raw = {}
    cfg = ServerConfig()
    with tempfile.TemporaryDirectory() as tmp:
        server = create_server("127.0.0.1:0", db_path=str(Path(tmp) / "bench.sqlite3"))
        try:
            with FlipfixClient(f"127.0.0.1:{server.port}", timeout=600) as client:
                # warm both paths (numba caches, CP-SAT import, server worker start)
                repair(p, cands, dom, method="greedy", time_limit=5.0)
                client.repair(p, doc_fix(doc, p), candidates=cands, method="greedy",
                              time_limit=5.0)
                cases = [("greedy", 30.0)] + ([] if quick else [("portfolio", 1.0)])
                for method, T in cases:
                    # best of 5 for the short greedy job (timings here vary by ~20 % from
                    # call to call); one run of the 1 s portfolio
                    rep = 1 if method == "portfolio" or quick else 5
                    res, t_in = _timed(lambda: repair(p, cands, dom, method=method,
                                                      time_limit=T, workers=1), rep)
                    out, t_svc = _timed(lambda: client.repair(
                        p, doc_fix(doc, p), candidates=cands, method=method, time_limit=T,
                        workers=1), rep)
                    req, t_req = _timed(lambda: client.repair_request(
                        p, doc_fix(doc, p), candidates=cands, method=method, time_limit=T,
                        workers=1))
                    blob, t_enc = _timed(req.SerializeToString)
                    t_dec = _server_decode(convert, pb, blob, cfg)
                    reply, t_rep = _timed(lambda: convert.result_to_reply(res, time_limit=T))
                    rblob, t_renc = _timed(reply.SerializeToString)
                    _, t_rdec = _timed(lambda: convert.reply_to_dict(
                        pb.RepairReply.FromString(rblob), p))
                    ser = t_req + t_enc + t_dec + t_rep + t_renc + t_rdec
                    ratio = t_svc / t_in
                    agree = abs(float(out["best"]["cost"]) - res.best.cost) <= 1e-6 * max(
                        1.0, abs(res.best.cost)) if method == "greedy" else None
                    row = {"case": f"{method} T={T:g}s K={K} n={p.n}", "in-process s": t_in,
                           "service s": t_svc, "ratio": ratio, "request MB": len(blob) / 2**20,
                           "client encode s": t_req + t_enc, "server decode s": t_dec,
                           "reply s": t_rep + t_renc + t_rdec,
                           "serialisation share": f"{100 * ser / t_svc:.0f}%",
                           "target": "PASS" if ratio < TARGET else "MISS"}
                    rows.append(row)
                    raw[row["case"]] = {**row, "same_best_cost": agree,
                                        "reply_MB": len(rblob) / 2**20}
                    log(table([row], COLUMNS).splitlines()[-1])
                # the largest request under the default limits
                per_cand = (len(blob) - _request_size(client, p, doc, cands, 1)) / (K - 1)
                fixed_part = len(blob) - per_cand * K
                k_bytes = int((cfg.max_message_bytes - fixed_part) // per_cand)
                k_max = min(k_bytes, cfg.max_candidates or k_bytes)
                limits = {"max_message_bytes": cfg.max_message_bytes,
                          "max_candidates": cfg.max_candidates,
                          "max_variables": cfg.max_variables,
                          "max_constraints": cfg.max_constraints,
                          "bytes_per_candidate_n1000": per_cand,
                          "largest_K_at_n1000": k_max,
                          "binding_limit": "max_candidates" if k_max < k_bytes
                          else "max_message_bytes",
                          "largest_request_MB_at_n1000": (fixed_part + per_cand * k_max) / 2**20}
                if not quick:
                    limits.update(_probe(client, p, doc, rng, k_max, cfg.max_message_bytes,
                                         bytes_bound=k_max == k_bytes))
                raw["limits"] = limits
                log(f"largest request: {limits}")
        finally:
            server.shutdown(grace=1.0)
    return {"rows": rows, "columns": COLUMNS, "raw": raw}


def doc_fix(doc, p):
    """The fix document with the problem's own (integer) labels."""
    return [{**d, "values": {int(k): v for k, v in d["values"].items()}} for d in doc]


def _request_size(client, p, doc, cands, k):
    sub = CandidateSet(cands.ids[:k], cands.X[:k])
    return len(client.repair_request(p, doc_fix(doc, p), candidates=sub,
                                     method="greedy").SerializeToString())


def _server_decode(convert, pb, blob, cfg):
    """What the server does before calling the core: parse, check the limits, convert to
    domain objects and compile the constraints (once; the worker gets the result)."""
    t = time.perf_counter()
    req = pb.RepairRequest.FromString(blob)
    lim = cfg.limits
    lim.model(req.inline.model, "inline.model")
    prob = convert.model_to_problem(req.inline.model, field="inline.model")
    lim.candidates(req.inline.candidates, "inline.candidates")
    convert.batch_to_arrays(prob, req.inline.candidates, field="inline.candidates")
    lim.constraints(req.constraints, "constraints")
    convert.constraints_to_compiled(req.constraints, prob)
    return time.perf_counter() - t


def _probe(client, p, doc, rng, k_max, limit, *, bytes_bound):
    """Send the largest inline request within the default limits (random candidates, greedy,
    1 s) and the same request with one candidate more.

    ``k_max`` is the estimate (the smaller of ``max_candidates`` and what fits in ``limit``
    bytes); when the bytes bind, the exact K is found by bisection around it on the
    request's own ByteSize (ids grow with K, so the size per candidate is not constant)."""
    import grpc

    def request(k):
        X = rng.integers(0, 2, size=(k, p.n), dtype=np.int8)
        return client.repair_request(p, doc_fix(doc, p), candidates=CandidateSet.from_array(p, X),
                                     method="greedy", time_limit=1.0)

    k_fit = k_max
    if bytes_bound:
        lo, hi = int(0.9 * k_max), int(1.1 * k_max) + 2
        while hi - lo > 1:  # request(lo) fits, request(hi) does not
            mid = (lo + hi) // 2
            lo, hi = (mid, hi) if request(mid).ByteSize() <= limit else (lo, mid)
        k_fit = lo
    out = {}
    for key, k in (("probe_at_max", k_fit), ("probe_over_max", k_fit + 1)):
        req = request(k)
        t = time.perf_counter()
        try:
            client.stub.Repair(req, timeout=600)
            out[key] = {"K": k, "bytes": req.ByteSize(), "result": "OK",
                        "seconds": time.perf_counter() - t}
        except grpc.RpcError as err:
            out[key] = {"K": k, "bytes": req.ByteSize(), "result": err.code().name,
                        "detail": (err.details() or "")[:200], "seconds": time.perf_counter() - t}
    return out


def render(section: dict) -> str:
    if not section["rows"]:
        return f"### Service overhead\n\n{section.get('note', 'not measured')}"
    text = table(section["rows"], COLUMNS,
                 title="Service overhead (gRPC loopback vs in-process; target ratio < 1.5)")
    lim = section["raw"].get("limits", {})
    if lim:
        text += (f"\n\nLargest request under the default limits (max_message_bytes="
                 f"{lim['max_message_bytes']}, max_candidates={lim['max_candidates']}, "
                 f"max_variables={lim['max_variables']}): K={lim['largest_K_at_n1000']} "
                 f"candidates of n=1000 (~{lim['largest_request_MB_at_n1000']:.1f} MB, "
                 f"{lim['bytes_per_candidate_n1000']:.0f} bytes per candidate; binding limit: "
                 f"{lim['binding_limit']})")
        for key in ("probe_at_max", "probe_over_max"):
            if key in lim:
                pr = lim[key]
                text += (f"; sent K={pr['K']} random candidates ({pr.get('bytes', 0)} bytes): "
                         f"{pr['result']} in {pr['seconds']:.1f} s")
    return text
