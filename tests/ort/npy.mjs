// Reader and writer for .npy files, following the NumPy format spec
// (numpy.lib.format, "NPY format" versions 1.0 to 3.0): magic "\x93NUMPY",
// major/minor version bytes, a little-endian header length (2 bytes in 1.0,
// 4 bytes in 2.0/3.0), then a Python dict literal with 'descr',
// 'fortran_order' and 'shape', padded with spaces and ended by '\n'.
import { readFileSync, writeFileSync, renameSync } from 'node:fs';

const MAGIC = [0x93, 0x4e, 0x55, 0x4d, 0x50, 0x59]; // \x93NUMPY

// descr -> [ort dtype name, typed array constructor]; little-endian only.
const DESCRS = {
  '<f4': ['float32', Float32Array],
  '<i8': ['int64', BigInt64Array],
  '<i4': ['int32', Int32Array],
  '|u1': ['uint8', Uint8Array],
  '<u1': ['uint8', Uint8Array],
  '|i1': ['int8', Int8Array],
  '|b1': ['bool', Uint8Array],
};
const DESCR_OF = { float32: '<f4', int64: '<i8', int32: '<i4', uint8: '|u1', int8: '|i1', bool: '|b1' };

function fail(path, what) {
  throw new Error(`${path}: ${what}`);
}

export function readNpy(path) {
  let buf;
  try {
    buf = readFileSync(path);
  } catch (err) {
    fail(path, `cannot read (${err.code || err.message})`);
  }
  if (buf.length < 10 || MAGIC.some((b, i) => buf[i] !== b)) fail(path, 'not a .npy file (bad magic)');
  const major = buf[6];
  let headerLen, start;
  if (major === 1) {
    headerLen = buf.readUInt16LE(8);
    start = 10;
  } else if (major === 2 || major === 3) {
    if (buf.length < 12) fail(path, 'truncated header');
    headerLen = buf.readUInt32LE(8);
    start = 12;
  } else {
    fail(path, `unsupported .npy version ${major}.${buf[7]}`);
  }
  if (start + headerLen > buf.length) fail(path, 'header runs past the end of the file');
  const header = buf.toString(major === 3 ? 'utf8' : 'latin1', start, start + headerLen);
  const descr = /'descr'\s*:\s*'([^']*)'/.exec(header);
  const fortran = /'fortran_order'\s*:\s*(True|False)/.exec(header);
  const shape = /'shape'\s*:\s*\(([^)]*)\)/.exec(header);
  if (!descr || !fortran || !shape) fail(path, `cannot parse header ${JSON.stringify(header.trim())}`);
  if (fortran[1] === 'True') fail(path, 'fortran_order arrays are not supported');
  const kind = DESCRS[descr[1]];
  if (!kind) fail(path, `dtype '${descr[1]}' not supported (float32, int64, int32, uint8, int8, bool)`);
  const dims = shape[1].split(',').map((s) => s.trim()).filter((s) => s.length > 0).map((s) => {
    if (!/^\d+$/.test(s)) fail(path, `bad dimension '${s}' in shape`);
    return Number(s);
  });
  const count = dims.reduce((a, b) => a * b, 1);
  const [type, Ctor] = kind;
  const offset = start + headerLen;
  const nbytes = count * Ctor.BYTES_PER_ELEMENT;
  if (!Number.isSafeInteger(nbytes) || offset + nbytes !== buf.length) {
    fail(path, `holds ${buf.length - offset} data bytes, shape (${dims.join(', ')}) of ${descr[1]} needs ${nbytes}`);
  }
  // Copy into a fresh, aligned buffer: the file buffer's offset may not be a
  // multiple of the element size.
  const data = new Ctor(count);
  new Uint8Array(data.buffer).set(buf.subarray(offset, offset + nbytes));
  return { type, dims, data };
}

export function writeNpy(path, type, dims, data) {
  const descr = DESCR_OF[type];
  if (!descr) throw new Error(`${path}: cannot write tensors of type ${type}`);
  const shape = dims.length === 1 ? `(${dims[0]},)` : `(${dims.join(', ')})`;
  let header = `{'descr': '${descr}', 'fortran_order': False, 'shape': ${shape}, }`;
  // Pad with spaces so magic + version + length + header is a multiple of 64.
  const total = 10 + header.length + 1;
  header += ' '.repeat((64 - (total % 64)) % 64) + '\n';
  const head = Buffer.alloc(10);
  MAGIC.forEach((b, i) => { head[i] = b; });
  head[6] = 1;
  head[7] = 0;
  head.writeUInt16LE(header.length, 8);
  let body;
  if (type === 'bool') body = Buffer.from(Uint8Array.from(data, (v) => (v ? 1 : 0)).buffer);
  else body = Buffer.from(data.buffer, data.byteOffset, data.byteLength);
  const tmp = `${path}.tmp${process.pid}`;
  writeFileSync(tmp, Buffer.concat([head, Buffer.from(header, 'latin1'), body]));
  renameSync(tmp, path);
}
