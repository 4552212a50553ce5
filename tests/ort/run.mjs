// Run an ONNX file with onnxruntime-web (npm; wasm backend, one thread) and
// write its outputs as .npy files: an outside runtime for recoup's tests.
//
//   node tests/ort/run.mjs MODEL.onnx OUT_DIR IN1.npy [IN2.npy ...] [--opt disabled|basic|extended|all]
//
// Inputs are fed in the model's input order; output i is written to
// OUT_DIR/<i>.npy. Any error: one line on stderr and exit status 1.
import { readFileSync, mkdirSync } from 'node:fs';
import { join } from 'node:path';
import * as ort from 'onnxruntime-web';
import { readNpy, writeNpy } from './npy.mjs';

const USAGE = 'usage: node run.mjs MODEL.onnx OUT_DIR IN1.npy [IN2.npy ...] [--opt disabled|basic|extended|all]';
const OPT_LEVELS = ['disabled', 'basic', 'extended', 'all'];

function parseArgs(argv) {
  const pos = [];
  let opt = 'all';
  for (let i = 0; i < argv.length; i++) {
    const a = argv[i];
    if (a === '--opt') {
      if (i + 1 >= argv.length) throw new Error(`--opt needs a value (${OPT_LEVELS.join('|')})`);
      opt = argv[++i];
    } else if (a.startsWith('--opt=')) {
      opt = a.slice(6);
    } else if (a === '-h' || a === '--help') {
      console.log(USAGE);
      process.exit(0);
    } else if (a.startsWith('--')) {
      throw new Error(`unknown option ${a}; ${USAGE}`);
    } else {
      pos.push(a);
    }
  }
  if (!OPT_LEVELS.includes(opt)) throw new Error(`--opt ${opt}: expected one of ${OPT_LEVELS.join(', ')}`);
  if (pos.length < 2) throw new Error(USAGE);
  return { model: pos[0], outDir: pos[1], inputs: pos.slice(2), opt };
}

async function main() {
  const args = parseArgs(process.argv.slice(2));
  let bytes;
  try {
    bytes = readFileSync(args.model);
  } catch (err) {
    throw new Error(`${args.model}: cannot read (${err.code || err.message})`);
  }
  ort.env.wasm.numThreads = 1;
  ort.env.logLevel = 'error';
  let session;
  try {
    session = await ort.InferenceSession.create(new Uint8Array(bytes), {
      executionProviders: ['wasm'],
      graphOptimizationLevel: args.opt,
    });
  } catch (err) {
    throw new Error(`${args.model}: onnxruntime-web cannot load the model: ${err.message || err}`);
  }
  const names = session.inputNames;
  if (names.length !== args.inputs.length) {
    throw new Error(`${args.model}: model has ${names.length} input(s) (${names.join(', ')}), ${args.inputs.length} .npy file(s) given`);
  }
  const feeds = {};
  names.forEach((name, i) => {
    const a = readNpy(args.inputs[i]);
    feeds[name] = new ort.Tensor(a.type, a.data, a.dims);
  });
  let results;
  try {
    results = await session.run(feeds);
  } catch (err) {
    throw new Error(`${args.model}: onnxruntime-web run failed: ${err.message || err}`);
  }
  mkdirSync(args.outDir, { recursive: true });
  session.outputNames.forEach((name, i) => {
    const t = results[name];
    writeNpy(join(args.outDir, `${i}.npy`), t.type, t.dims, t.data);
  });
  await session.release();
}

main().catch((err) => {
  const msg = String(err && err.message ? err.message : err).replace(/\s+/g, ' ').trim();
  process.stderr.write(`run.mjs: ${msg}\n`);
  process.exit(1);
});
