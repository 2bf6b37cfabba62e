// Writes the damage fixtures of hindcast/stages/recording/mcapread (SPEC §7.5)
// with an independent MCAP implementation, and says exactly where every record
// of each file lies, so the Go tests can cut and corrupt the files at known
// places and know which messages must survive:
//   - npm @mcap/core McapWriter writes the files (MCAP spec, mcap.dev);
//   - zstd chunks are compressed by npm @foxglove/wasm-zstd; lz4 chunks by the
//     lz4 reference command line tool (`lz4`, LZ4 frame format), each read
//     back by npm @foxglove/wasm-lz4 before use;
//   - the record boundaries come from npm @mcap/core McapStreamReader: the file
//     is read back whole (CRCs validated) and a top-level record ends where
//     the reader's bytesRemaining() changes (the Footer 8 bytes before, as the
//     reader takes the closing magic with it); the records a chunk holds are
//     the ones it yields before the next change.
// Output (committed, so the Go tests never need node), in ../recordings/damage/:
//   damage-{zstd,lz4,none}.mcap  chunked (small chunks), indexed, summary;
//   damage-zstd-nosummary.mcap   chunked, zstd, no summary (Channel records
//                                only inside the chunks);
//   damage-unchunked.mcap        the same messages, no chunks, no index;
//   damage.json                  the messages in file order and, per file, every
//                                top-level record: offset, end, opcode, the
//                                messages it holds (indexes into messages), the
//                                topics of the Channel records it holds and, for
//                                a chunk, where its compressed records lie.
// Run from testdata/node: `node damage-fixtures.mjs` (needs `lz4` on PATH).
import { execFileSync } from "node:child_process";
import { mkdirSync, writeFileSync } from "node:fs";
import { createRequire } from "node:module";
import { dirname, join } from "node:path";
import { fileURLToPath } from "node:url";
import { McapStreamReader, McapWriter } from "@mcap/core";

const require = createRequire(import.meta.url);
const zstd = require("@foxglove/wasm-zstd");
const lz4decompress = require("@foxglove/wasm-lz4");
await zstd.isLoaded;
await lz4decompress.isLoaded;

const out = join(dirname(fileURLToPath(import.meta.url)), "..", "recordings", "damage");
mkdirSync(out, { recursive: true });

const BASE = 1_700_000_000_000_000_000n; // an invented epoch time, ns
const ms = (n) => BASE + BigInt(n) * 1_000_000n;

// The messages, in file order. Times are not monotone in the file (commands
// are logged 3 ms before the joints message written ahead of them) and some
// are equal, so order by (time, file position) is exercised by every cut.
const msgs = [];
const add = (topic, t, value) => msgs.push({ topic, t, value });
add("/session/task", ms(0), { name: "sort parcels" });
for (let k = 0; k < 40; k++) {
  add("/arm/joints", ms(10 * k), { position: [k, k / 2, k / 4] });
  if (k % 2 === 0) add("/arm/command", ms(10 * k - 3), { velocity: [k / 10, -k / 10] });
  if (k % 5 === 0) add("/wrist/image", ms(10 * k), { data: Buffer.from([0xff, 0xd8, k, 0xff, 0xd9]).toString("base64") });
}
add("/session/event", ms(390), { kind: "end" });
for (const [i, m] of msgs.entries()) {
  m.index = i;
  m.data = new TextEncoder().encode(JSON.stringify(m.value));
}

const compressors = {
  zstd: (data) => {
    const c = zstd.compress(Buffer.from(data), 3);
    if (Buffer.compare(zstd.decompress(c, data.length), Buffer.from(data)) !== 0) throw new Error("zstd round trip");
    return { compression: "zstd", compressedData: new Uint8Array(c) };
  },
  lz4: (data) => {
    const c = execFileSync("lz4", ["-c", "-q", "--content-size"], { input: Buffer.from(data) });
    if (Buffer.compare(lz4decompress(c, data.length), Buffer.from(data)) !== 0) throw new Error("lz4 round trip");
    return { compression: "lz4", compressedData: new Uint8Array(c) };
  },
};
const decompressHandlers = {
  zstd: (buf, size) => zstd.decompress(Buffer.from(buf), Number(size)),
  lz4: (buf, size) => lz4decompress(Buffer.from(buf), Number(size)),
};

async function write(opts) {
  const parts = [];
  let pos = 0n;
  const writable = {
    write: async (buf) => {
      parts.push(Buffer.from(buf));
      pos += BigInt(buf.byteLength);
    },
    position: () => pos,
  };
  const w = new McapWriter({ writable, chunkSize: 300, ...opts });
  await w.start({ profile: "", library: "hindcast damage fixtures (@mcap/core)" });
  await w.addMetadata({ name: "robot", metadata: new Map([["unit", "arm-11"], ["model", "picker6"]]) });
  const chans = {};
  for (const m of msgs) {
    if (!(m.topic in chans)) {
      chans[m.topic] = await w.registerChannel({ topic: m.topic, messageEncoding: "json", schemaId: 0, metadata: new Map() });
    }
    await w.addMessage({ channelId: chans[m.topic], sequence: m.index, logTime: m.t, publishTime: m.t, data: m.data });
  }
  await w.end();
  return Buffer.concat(parts);
}

// records reads file back with McapStreamReader and returns its top-level
// records, and for each the messages it holds.
function records(file) {
  const r = new McapStreamReader({ includeChunks: true, decompressHandlers, validateCrcs: true });
  r.append(file);
  const recs = [{ offset: 0, end: 8, op: "Magic", messages: [], channels: [] }];
  let at = 8;
  let seen = 0;
  for (;;) {
    const rec = r.nextRecord();
    if (!rec) break;
    let end = file.length - r.bytesRemaining();
    // The reader takes the closing magic together with the Footer.
    if (rec.type === "Footer") {
      end -= 8;
      if (Buffer.compare(file.subarray(end), file.subarray(0, 8)) !== 0) throw new Error("no closing magic");
    }
    if (end !== at) {
      const top = { offset: at, end, op: rec.type, messages: [], channels: [] };
      if (rec.type === "Chunk") {
        top.compression = rec.compression;
        top.records_offset = end - rec.records.byteLength;
        top.records_length = rec.records.byteLength;
      }
      recs.push(top);
      at = end;
      if (rec.type === "Chunk") continue;
    }
    if (rec.type === "Channel") recs[recs.length - 1].channels.push(rec.topic);
    if (rec.type === "Message") {
      const m = msgs[seen];
      if (rec.sequence !== m.index || rec.logTime !== m.t || Buffer.compare(Buffer.from(rec.data), Buffer.from(m.data)) !== 0) {
        throw new Error(`message ${seen} read back differs`);
      }
      recs[recs.length - 1].messages.push(seen++);
    }
  }
  if (!r.done() || seen !== msgs.length) throw new Error(`read back ${seen} of ${msgs.length} messages, done ${r.done()}`);
  if (file.length - at !== 8) throw new Error(`${file.length - at} bytes after the footer`);
  recs.push({ offset: at, end: file.length, op: "Magic", messages: [], channels: [] });
  return recs;
}

const files = {};
const variants = {
  "damage-zstd.mcap": { compressChunk: compressors.zstd },
  "damage-lz4.mcap": { compressChunk: compressors.lz4 },
  "damage-none.mcap": {},
  // Chunked without summary: the Channel records are only in the chunks.
  "damage-zstd-nosummary.mcap": {
    compressChunk: compressors.zstd,
    useStatistics: false,
    useSummaryOffsets: false,
    useChunkIndex: false,
    useMetadataIndex: false,
    useAttachmentIndex: false,
    repeatSchemas: false,
    repeatChannels: false,
  },
  "damage-unchunked.mcap": {
    useChunks: false,
    useStatistics: false,
    useSummaryOffsets: false,
    useMessageIndex: false,
    useChunkIndex: false,
    useMetadataIndex: false,
    useAttachmentIndex: false,
    repeatSchemas: false,
    repeatChannels: false,
  },
};
for (const [name, opts] of Object.entries(variants)) {
  const file = await write(opts);
  writeFileSync(join(out, name), file);
  files[name] = { size: file.length, records: records(file) };
}

const expected = {
  writers:
    "MCAP by npm @mcap/core McapWriter; zstd chunks by npm @foxglove/wasm-zstd, lz4 chunks by the lz4 reference tool; " +
    "record boundaries by npm @mcap/core McapStreamReader (bytesRemaining)",
  messages: msgs.map((m) => ({
    topic: m.topic,
    log_time: m.t.toString(),
    publish_time: m.t.toString(),
    data_b64: Buffer.from(m.data).toString("base64"),
  })),
  files,
};
writeFileSync(join(out, "damage.json"), JSON.stringify(expected, null, 1) + "\n");
