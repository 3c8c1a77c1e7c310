'use strict';
// A Node.js caller of the flipfix contract, written from proto/flipfix/v1/flipfix.proto
// alone: health, CreateProblem, AddCandidates (server-assigned ids), Repair (the answer
// checked against this script's own recomputation and a brute-force optimum),
// RepairStream, a malformed request (its google.rpc.Status details decoded), and a
// deadline shorter than the requested time limit.
//
//   node check.js HOST:PORT PROTO_ROOT
//
// Prints one JSON object with what it saw; exits 1 (with the reason on stderr) when a
// check fails. The model is a small invented QUBO (demo data).

const path = require('path');
const grpc = require('@grpc/grpc-js');
const protoLoader = require('@grpc/proto-loader');
const protobuf = require('protobufjs');

const [target, protoRoot] = process.argv.slice(2);
if (!target || !protoRoot) {
  console.error('usage: node check.js HOST:PORT PROTO_ROOT');
  process.exit(2);
}

const def = protoLoader.loadSync(['flipfix/v1/flipfix.proto', 'grpc/health/v1/health.proto'], {
  keepCase: true, longs: Number, enums: String, defaults: true, oneofs: true,
  includeDirs: [protoRoot, path.join(__dirname, 'proto')],
});
const pkg = grpc.loadPackageDefinition(def);
const creds = grpc.credentials.createInsecure();
const fx = new pkg.flipfix.v1.Flipfix(target, creds);
const health = new pkg.grpc.health.v1.Health(target, creds);

// google.rpc.Status and the two detail messages flipfix sends, for the
// grpc-status-details-bin trailer (field numbers as google/rpc/*.proto define them).
const rpcTypes = protobuf.Root.fromJSON({
  nested: {
    google: {
      nested: {
        protobuf: { nested: { Any: { fields: { type_url: { type: 'string', id: 1 }, value: { type: 'bytes', id: 2 } } } } },
        rpc: {
          nested: {
            Status: {
              fields: {
                code: { type: 'int32', id: 1 }, message: { type: 'string', id: 2 },
                details: { rule: 'repeated', type: 'google.protobuf.Any', id: 3 },
              },
            },
            ErrorInfo: {
              fields: {
                reason: { type: 'string', id: 1 }, domain: { type: 'string', id: 2 },
                metadata: { keyType: 'string', type: 'string', id: 3 },
              },
            },
            BadRequest: {
              fields: { field_violations: { rule: 'repeated', type: 'FieldViolation', id: 1 } },
              nested: {
                FieldViolation: {
                  fields: { field: { type: 'string', id: 1 }, description: { type: 'string', id: 2 } },
                },
              },
            },
          },
        },
      },
    },
  },
});

function fail(msg) {
  const err = new Error(msg);
  err.checkFailed = true;
  throw err;
}

function check(cond, msg) {
  if (!cond) fail(msg);
}

function call(client, method, request, deadlineMs = 60000) {
  return new Promise((resolve, reject) => {
    client[method](request, { deadline: Date.now() + deadlineMs }, (err, reply) => (err ? reject(err) : resolve(reply)));
  });
}

function statusDetails(err) {
  const raw = err.metadata && err.metadata.get('grpc-status-details-bin');
  check(raw && raw.length === 1, 'no grpc-status-details-bin trailer');
  const status = rpcTypes.lookupType('google.rpc.Status').decode(raw[0]);
  const out = { code: status.code, message: status.message, info: null, violations: [] };
  for (const any of status.details) {
    if (any.type_url.endsWith('/google.rpc.ErrorInfo')) {
      out.info = rpcTypes.lookupType('google.rpc.ErrorInfo').decode(any.value);
    } else if (any.type_url.endsWith('/google.rpc.BadRequest')) {
      out.violations = rpcTypes.lookupType('google.rpc.BadRequest').decode(any.value).field_violations
        .map((v) => ({ field: v.field, description: v.description }));
    }
  }
  return out;
}

// ---------------------------------------------------------------- the model (demo data)
const labels = ['x0', 'x1', 'x2', 'x3', 'x4', 'x5'];
const n = labels.length;
const linear = [-2.0, 1.5, -1.0, -3.0, 0.5, -1.5];
const quadratic = [[0, 1, 2.0], [1, 2, -1.5], [2, 3, 3.0], [3, 4, -2.0], [4, 5, 1.0], [0, 5, 2.5], [1, 3, -0.5]];
const offset = 0.25;
const candidates = [[1, 0, 1, 1, 0, 0], [0, 1, 0, 1, 1, 1], [1, 1, 1, 0, 0, 1]];

function energy(x) {
  let e = offset;
  for (let j = 0; j < n; j++) e += linear[j] * x[j];
  for (const [u, v, b] of quadratic) e += b * x[u] * x[v];
  return e;
}

// PackedAssignments: bit 7 - (j % 8) of byte k * ceil(n / 8) + floor(j / 8)
function pack(rows) {
  const rb = Math.ceil(n / 8);
  const buf = Buffer.alloc(rows.length * rb);
  rows.forEach((row, k) => row.forEach((bit, j) => {
    if (bit) buf[k * rb + (j >> 3)] |= 1 << (7 - (j % 8));
  }));
  return { count: rows.length, num_variables: n, bits: buf };
}

function unpack(packed) {
  const rb = Math.ceil(packed.num_variables / 8);
  const rows = [];
  for (let k = 0; k < packed.count; k++) {
    const row = [];
    for (let j = 0; j < packed.num_variables; j++) row.push((packed.bits[k * rb + (j >> 3)] >> (7 - (j % 8))) & 1);
    rows.push(row);
  }
  return rows;
}

const label = (s) => ({ str: s });
// late constraints: x0 fixed to 0, and at most two of x1..x5 set
const constraints = [
  { fix: { values: { values: [{ label: label('x0'), value: 0 }] } } },
  { linear: { terms: labels.slice(1).map((s) => ({ label: label(s), bias: 1 })), sense: 'SENSE_LE', rhs: 2 } },
];

function bruteForce() {
  let best = Infinity;
  for (let m = 0; m < 1 << n; m++) {
    const x = labels.map((_, j) => (m >> j) & 1);
    if (x[0] !== 0 || x.slice(1).reduce((a, b) => a + b, 0) > 2) continue;
    best = Math.min(best, energy(x));
  }
  return best;
}

async function main() {
  const seen = {};
  const h = await call(health, 'Check', { service: 'flipfix.v1.Flipfix' });
  check(h.status === 'SERVING', `health: ${h.status}`);
  seen.health = h.status;

  const name = `node-${process.pid}`;
  const info = await call(fx, 'CreateProblem', {
    name,
    model: {
      vartype: 'VARTYPE_BINARY', labels: labels.map(label), offset,
      linear: labels.map((s, j) => ({ label: label(s), bias: linear[j] })),
      quadratic: quadratic.map(([u, v, b]) => ({ u: label(labels[u]), v: label(labels[v]), bias: b })),
    },
  });
  check(info.revision === 1 && info.num_variables === n, `CreateProblem: ${JSON.stringify(info)}`);

  // no ids: the server assigns c0, c1, c2
  const added = await call(fx, 'AddCandidates', { problem: name, candidates: { values: pack(candidates) } });
  check(JSON.stringify(added.ids) === JSON.stringify(['c0', 'c1', 'c2']), `ids: ${added.ids}`);
  seen.ids = added.ids;

  const request = { problem: name, constraints, options: { method: 'METHOD_CPSAT', time_limit: 5, seed: 1 } };
  const reply = await call(fx, 'Repair', request);
  const [x] = unpack(reply.best.values);
  const origin = candidates[added.ids.indexOf(reply.best.candidate_id)];
  const flips = x.reduce((a, b, j) => a + (b !== origin[j] ? 1 : 0), 0);
  check(reply.repair_status === 'REPAIR_STATUS_OPTIMAL', `status: ${reply.repair_status}`);
  check(Math.abs(reply.best.cost - energy(x)) < 1e-9, `cost ${reply.best.cost} != recomputed ${energy(x)}`);
  check(Math.abs(reply.best.cost - bruteForce()) < 1e-9, `cost ${reply.best.cost} != brute force ${bruteForce()}`);
  check(reply.best.flips === flips, `flips ${reply.best.flips} != recomputed ${flips}`);
  check(reply.best.feasible && x[0] === 0, 'answer infeasible');
  check(reply.best.solvers.length > 0 && !reply.best.solvers.includes('SOLVER_UNSPECIFIED'), `solvers: ${reply.best.solvers}`);
  Object.assign(seen, {
    repaired_cost: reply.best.cost, recomputed_cost: energy(x), brute_force_cost: bruteForce(),
    flips, status: reply.repair_status, method_used: reply.method_used, solvers: reply.best.solvers,
  });

  // the stream: progress messages, then the result
  const events = await new Promise((resolve, reject) => {
    const got = [];
    const stream = fx.RepairStream({ ...request, options: { method: 'METHOD_GREEDY', time_limit: 2 } },
      { deadline: Date.now() + 60000 });
    stream.on('data', (ev) => got.push(ev));
    stream.on('error', reject);
    stream.on('end', () => resolve(got));
  });
  const last = events[events.length - 1];
  check(last && last.event === 'result', 'stream did not end in a result');
  check(events.slice(0, -1).every((ev) => ev.event === 'progress'), 'stream: a result before the end');
  check(events.length >= 2, 'stream: no progress message');
  seen.stream = { progress: events.length - 1, phases: [...new Set(events.slice(0, -1).map((ev) => ev.progress.current_phase))], status: last.result.repair_status };

  // a malformed request: the value 3 at position 1 of a fix
  try {
    await call(fx, 'Repair', {
      problem: name, constraints: [{ fix: { values: { values: [{ label: label('x1'), value: 1 }, { label: label('x2'), value: 3 }] } } }],
    });
    fail('a value of 3 in a BINARY fix was accepted');
  } catch (err) {
    if (err.checkFailed) throw err;
    check(err.code === grpc.status.INVALID_ARGUMENT, `code ${err.code}`);
    const d = statusDetails(err);
    check(d.info && d.info.domain === 'flipfix.v1' && d.info.reason === 'INVALID_FIELD', `ErrorInfo: ${JSON.stringify(d.info)}`);
    check(d.info.metadata.field === 'constraints[0].fix.values.values[1]', `ErrorInfo field: ${d.info.metadata.field}`);
    check(d.violations.length === 1 && d.violations[0].field === 'constraints[0].fix.values.values[1]', `violations: ${JSON.stringify(d.violations)}`);
    seen.error = { reason: d.info.reason, field: d.info.metadata.field, description: d.violations[0].description, message: err.details };
  }

  // a deadline (1.5 s) shorter than the time limit (30 s): an answer in time, the budget cut
  const t0 = Date.now();
  const quick = await call(fx, 'Repair', { ...request, options: { method: 'METHOD_PORTFOLIO', time_limit: 30 } }, 1500);
  const elapsed = (Date.now() - t0) / 1000;
  check(elapsed < 1.5, `the deadline call took ${elapsed} s`);
  check(quick.time_limit > 0 && quick.time_limit < 1.5, `budget given: ${quick.time_limit}`);
  check(quick.best.feasible, 'deadline call: infeasible answer');
  seen.deadline = { elapsed, budget: quick.time_limit };

  await call(fx, 'DeleteProblem', { name });
  return seen;
}

main().then((seen) => {
  console.log(JSON.stringify(seen));
  process.exit(0);
}, (err) => {
  console.error(err.checkFailed ? `check failed: ${err.message}` : err.stack || String(err));
  process.exit(1);
});
