// Calling candor from Node.js with @grpc/grpc-js and @grpc/proto-loader.
//
// Usage: node client.js TARGET ROWS.jsonl EXPECTED.csv
//
//   TARGET        the sidecar's data-plane address, e.g. 127.0.0.1:50551
//   ROWS.jsonl    predictions to send, one {"logits": [...], "label": k} per line
//   EXPECTED.csv  `candor apply --decisions` on the same rows and map: the answers to expect
//
// Calls Calibrate (one row), CalibrateStream (the other rows), RecordOutcome (a person's label for
// an earlier request, then the same label again) and the documented errors, prints what it got,
// and exits 1 on any answer that differs from what was expected.
// Needs: npm ci (in this folder).
'use strict';

const fs = require('node:fs');
const path = require('node:path');
const grpc = require('@grpc/grpc-js');
const protoLoader = require('@grpc/proto-loader');

const MODEL = 'letter-sorter';
// The sidecar answers in float32, `candor apply` prints float32: allow a few float32 ulps.
const F32_TOLERANCE = 1e-6;
const PROTO_DIR = process.env.CANDOR_PROTO_DIR || path.join(__dirname, '../../proto');

// The API, loaded from proto/ at run time; field names as in the .proto file.
const definition = protoLoader.loadSync('candor/v1/calibrator.proto', {
  includeDirs: [PROTO_DIR],
  keepCase: true,
  enums: String,
  longs: String,
  defaults: true,
  oneofs: true,
});
const { Calibrator } = grpc.loadPackageDefinition(definition).candor.v1;

let failures = 0;

function check(what, ok, got) {
  console.log(`${ok ? 'ok  ' : 'FAIL'} ${what}: ${got}`);
  if (!ok) failures += 1;
}

// Compares one CalibrateResponse with a row of `candor apply --decisions`.
function checkAnswer(what, response, want) {
  const close = response.probabilities.length === want.p.length &&
    response.probabilities.every((g, k) => Math.abs(g - want.p[k]) <= F32_TOLERANCE);
  const ok = close && response.predicted_class === want.predicted &&
    response.decision === `DECISION_${want.decision.toUpperCase()}`;
  check(what, ok, `class ${response.predicted_class}, confidence ` +
    `${response.confidence.toFixed(4)}, ${response.decision}, map ${response.map_version}`);
}

// Promise wrappers around the callback API; every call has a deadline.
const deadline = (seconds) => ({ deadline: Date.now() + seconds * 1000 });
const unary = (client, method, request) => new Promise((resolve, reject) => {
  client[method](request, deadline(5), (err, reply) => (err ? reject(err) : resolve(reply)));
});

async function checkError(what, call, code) {
  try {
    await call();
    check(what, false, 'no error');
  } catch (err) {
    const name = Object.keys(grpc.status).find((k) => grpc.status[k] === err.code);
    check(what, err.code === code, `${name}: ${err.details}`);
  }
}

// Sends every request over one stream and collects the answers in order.
function stream(client, requests) {
  return new Promise((resolve, reject) => {
    const results = [];
    const call = client.CalibrateStream(deadline(10));
    call.on('data', (result) => results.push(result));
    call.on('error', reject);
    call.on('end', () => resolve(results));
    for (const request of requests) call.write(request);
    call.end();
  });
}

async function main(target, rowsPath, expectedPath) {
  const rows = fs.readFileSync(rowsPath, 'utf8').split('\n').filter((l) => l.trim())
    .map((l) => JSON.parse(l));
  const [header, ...lines] = fs.readFileSync(expectedPath, 'utf8').trim().split('\n');
  const columns = header.split(',');
  const expected = lines.map((line) => {
    const cell = Object.fromEntries(line.split(',').map((v, i) => [columns[i], v]));
    return {
      p: rows[0].logits.map((_, k) => Number(cell[`p${k}`])),
      predicted: Number(cell.predicted),
      decision: cell.decision,
    };
  });

  const client = new Calibrator(target, grpc.credentials.createInsecure());
  try {
    await new Promise((resolve, reject) => client.waitForReady(Date.now() + 10000,
      (err) => (err ? reject(err) : resolve())));

    // One prediction: raw logits in, calibrated probabilities and a decision out.
    const first = await unary(client, 'Calibrate',
      { model: MODEL, logits: rows[0].logits, request_id: 'js-0' });
    checkAnswer('Calibrate js-0', first, expected[0]);

    // Many predictions over one stream, answered in order.
    const requests = rows.slice(1)
      .map((r, i) => ({ model: MODEL, logits: r.logits, request_id: `js-${i + 1}` }));
    const results = await stream(client, requests);
    check('CalibrateStream answers', results.length === requests.length, results.length);
    results.forEach((result, i) => {
      const what = `CalibrateStream js-${i + 1}`;
      if (result.outcome === 'error') check(what, false, result.error.message);
      else checkAnswer(what, result.response, expected[i + 1]);
    });

    // A person's label for request js-0; sending the same label again is a harmless no-op.
    const label = rows[0].label;
    const outcome = { request_id: 'js-0', true_label: label };
    const told = await unary(client, 'RecordOutcome', outcome);
    check('RecordOutcome js-0', !told.duplicate &&
      told.correct === (first.predicted_class === label),
    `correct=${told.correct} duplicate=${told.duplicate}`);
    const again = await unary(client, 'RecordOutcome', outcome);
    check('RecordOutcome js-0 again', again.duplicate, `duplicate=${again.duplicate}`);

    // The documented errors.
    await checkError('wrong number of logits', () => unary(client, 'Calibrate',
      { model: MODEL, logits: [1.0, 2.0] }), grpc.status.INVALID_ARGUMENT);
    await checkError('unknown model', () => unary(client, 'Calibrate',
      { model: 'no-such-model', logits: rows[0].logits }), grpc.status.NOT_FOUND);
    await checkError('outcome for an unknown request', () => unary(client, 'RecordOutcome',
      { request_id: 'never-sent', true_label: 0 }), grpc.status.NOT_FOUND);
    await checkError('another label for js-0', () => unary(client, 'RecordOutcome',
      { request_id: 'js-0', true_label: (label + 1) % 6 }), grpc.status.ALREADY_EXISTS);
  } finally {
    client.close();
  }
  console.log(`node client: ${failures === 0 ? 'all answers as expected' : `${failures} wrong`}`);
  return failures === 0 ? 0 : 1;
}

if (process.argv.length !== 5) {
  console.error('usage: node client.js TARGET ROWS.jsonl EXPECTED.csv');
  process.exit(2);
}
main(...process.argv.slice(2)).then((code) => { process.exitCode = code; }, (err) => {
  console.error(`node client: ${err.stack || err}`);
  process.exitCode = 1;
});
