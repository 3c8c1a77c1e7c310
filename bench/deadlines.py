"""Short gRPC deadlines on a stored library: ``python -m bench.deadlines [--calls N]``.

One ``flipfix serve`` in-process (1 worker, queue 1) holds a random sparse model of 2,000
variables with 500 stored candidates (the library of ``tests/test_service_deadline.py``);
after one warm call, Repair calls with 20 fixings are sent at client deadlines of 0.3 s
and 1 s. Per call: the status, the wall time, the budget the server gave (the reply's
``time_limit``) and the search's own ``seconds``. Targets: every 0.3 s call answers with
a feasible answer; every 1 s call gets at least 0.7 s of search budget.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time

import grpc


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(prog="python -m bench.deadlines", description=__doc__.splitlines()[0])
    ap.add_argument("--calls", type=int, default=5, help="calls per deadline")
    args = ap.parse_args(argv)
    sys.path.insert(0, os.path.join(os.path.dirname(__file__), os.pardir, "tests"))
    from test_service_deadline import _random_library

    from flipfix.service import convert
    from flipfix.service.generated import flipfix_pb2 as pb
    from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
    from flipfix.service.server import create_server

    problem, _, X = _random_library(2000, 500, seed=5)
    fixed = {v: 1 for v in range(20)}
    with tempfile.TemporaryDirectory() as d:
        srv = create_server("127.0.0.1:0", db_path=os.path.join(d, "d.sqlite3"), workers=1,
                            queue_size=1)
        channel = grpc.insecure_channel(srv.address)
        stub = pb_grpc.FlipfixStub(channel)
        rows = []
        try:
            stub.CreateProblem(pb.CreateProblemRequest(
                name="big", model=convert.problem_to_model(problem)))
            stub.AddCandidates(pb.AddCandidatesRequest(problem="big", candidates=convert.arrays_to_batch(
                [f"c{k}" for k in range(X.shape[0])], X)))
            request = pb.RepairRequest(
                problem="big", options=pb.RepairOptions(time_limit=5.0, audit_limit=5),
                constraints=[pb.Constraint(fix=pb.FixVariables(
                    values=convert.dict_to_assignment(fixed)))])
            stub.Repair(request, timeout=60.0)  # the worker's first job loads the kernels
            for deadline in (0.3,) * args.calls + (1.0,) * args.calls:
                t = time.perf_counter()
                try:
                    r = stub.Repair(request, timeout=deadline)
                    row = (deadline, "OK", time.perf_counter() - t, r.time_limit, r.seconds,
                           r.best.feasible)
                except grpc.RpcError as e:
                    row = (deadline, e.code().name, time.perf_counter() - t, None, None, False)
                rows.append(row)
        finally:
            channel.close()
            srv.shutdown(grace=1.0)
    print(f"# python -m bench.deadlines --calls {args.calls}; load average "
          f"{' '.join(open('/proc/loadavg').read().split()[:3])}")
    print("| deadline s | status | wall s | budget s | search s | feasible |")
    print("|---|---|---|---|---|---|")
    for d, status, wall, budget, secs, feas in rows:
        f = (lambda v: "-" if v is None else f"{v:.3f}")
        print(f"| {d} | {status} | {wall:.3f} | {f(budget)} | {f(secs)} | {feas} |")
    short = [r for r in rows if r[0] == 0.3]
    long_ = [r for r in rows if r[0] == 1.0]
    ok_short = sum(r[1] == "OK" and r[5] for r in short)
    ok_long = sum(r[1] == "OK" and r[3] is not None and r[3] >= 0.7 for r in long_)
    print(f"- 0.3 s deadline answered feasibly in {ok_short}/{len(short)} calls: "
          f"{'PASS' if ok_short == len(short) else 'MISS'}")
    print(f"- 1 s deadline gave >= 0.7 s of search in {ok_long}/{len(long_)} calls: "
          f"{'PASS' if ok_long == len(long_) else 'MISS'}")


if __name__ == "__main__":
    main()
