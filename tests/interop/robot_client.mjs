// A Foray robot client on an independent gRPC implementation (@grpc/grpc-js with
// @grpc/proto-loader, loading proto/ directly; no generated code). It registers a robot,
// streams transitions over the session stream until they are acknowledged, asks for a plan on
// the same stream, exports the stored transitions, and prints one JSON object with what it saw.
//
//   node robot_client.mjs ADDRESS ADMIN_TOKEN_FILE PROTO_DIR TRANSITIONS
//
// Bounded: gives up after 30 s.

import fs from 'node:fs';
import path from 'node:path';
import grpc from '@grpc/grpc-js';
import protoLoader from '@grpc/proto-loader';

const [address, adminTokenFile, protoDir, countText] = process.argv.slice(2);
const count = Number(countText);
const timer = setTimeout(() => { console.error('robot_client: no result after 30 s'); process.exit(1); }, 30000);

const definition = protoLoader.loadSync(
  ['registry', 'session', 'monitoring'].map((n) => path.join(protoDir, 'foray', 'v1', `${n}.proto`)),
  { keepCase: true, longs: String, enums: String, defaults: true, oneofs: true, includeDirs: [protoDir] });
const v1 = grpc.loadPackageDefinition(definition).foray.v1;
const credentials = grpc.credentials.createInsecure();
const bearer = (token) => { const m = new grpc.Metadata(); m.add('authorization', `Bearer ${token}`); return m; };

// The transitions of a cart of our own, x' = x + 0.05 v, v' = v + 0.05 a, from closed forms so
// the Python side can recompute them.
function transition(seq) {
  const x = Math.sin(0.1 * seq), v = Math.cos(0.07 * seq), a = 0.9 * Math.sin(0.05 * seq);
  const nx = x + 0.05 * v, nv = v + 0.05 * a;
  return { seq: String(seq), episode: String(1 + Math.floor((seq - 1) / 40)), step: (seq - 1) % 40,
           state: [x, v], action: [a], next_state: [nx, nv], reward: -nx * nx, terminal: seq % 40 === 0 };
}

const spec = {
  name: 'node-cart', control_period_s: 0.05,
  state: [{ label: 'x', unit: 'm' }, { label: 'v', unit: 'm/s' }],
  action: [{ label: 'force', unit: 'N' }],
  action_limits: [{ min: -1, max: 1, max_step: 0.5 }],
  training: { min_transitions: 1000000 },
  planner: { horizon: 7, population: 40, elites: 5, iterations: 2 },
};

const admin = fs.readFileSync(adminTokenFile, 'utf8').trim();
const registry = new v1.RobotRegistry(address, credentials);
const registered = await new Promise((resolve, reject) =>
  registry.RegisterRobot({ spec }, bearer(admin), (err, r) => (err ? reject(err) : resolve(r))));
const robotId = registered.robot.robot_id, token = registered.token;

const session = new v1.RobotSession(address, credentials);
const seen = await new Promise((resolve, reject) => {
  const out = { welcome: null, acks: [], errors: [], plan: null };
  const stream = session.Connect(bearer(token));
  stream.on('data', (m) => {
    if (m.welcome) {
      out.welcome = m.welcome;
      for (let seq = 1; seq <= count; ++seq) stream.write({ transition: transition(seq) });
      stream.write({ plan_request: { request_id: '7', state: [0.1, -0.2], previous_action: [0.8], deadline_ms: 50 } });
    } else if (m.ack) {
      out.acks.push(m.ack);
    } else if (m.plan) {
      out.plan = m.plan;
    } else if (m.error) {
      out.errors.push(m.error);
    }
    const durable = out.acks.length ? Number(out.acks[out.acks.length - 1].durable_seq) : 0;
    if (durable >= count && out.plan) { stream.end(); resolve(out); }
  });
  stream.on('error', reject);
  stream.write({ hello: { robot_id: robotId, last_acked_seq: '0', client: 'node-interop/0.1' } });
});

const monitoring = new v1.Monitoring(address, credentials);
const exported = await new Promise((resolve, reject) => {
  const rows = [];
  const call = monitoring.ExportTransitions({ robot_id: robotId }, bearer(token));
  call.on('data', (batch) => rows.push(...batch.transitions));
  call.on('end', () => resolve(rows));
  call.on('error', reject);
});

clearTimeout(timer);
console.log(JSON.stringify({
  robot_id: robotId, token,
  welcome_last_seq: Number(seen.welcome.last_seq),
  durable_seq: Number(seen.acks[seen.acks.length - 1].durable_seq),
  accepted: seen.acks.reduce((n, a) => n + a.accepted, 0),
  errors: seen.errors,
  plan: { request_id: seen.plan.request_id, from_prior: seen.plan.from_prior,
          actions: seen.plan.steps.map((s) => s.action) },
  sent: Array.from({ length: count }, (_, i) => transition(i + 1)).map(
    (t) => [Number(t.seq), ...t.state, ...t.action, ...t.next_state, t.reward, t.terminal ? 1 : 0]),
  exported: exported.map((t) => [Number(t.seq), ...t.state, ...t.action, ...t.next_state, t.reward, t.terminal ? 1 : 0]),
}));
process.exit(0);
