// Writes the recording fixtures of hindcast/stages/recording with independent
// implementations:
//   - npm @mcap/core McapWriter writes the MCAP files (mcap.dev spec);
//   - npm @foxglove/rosmsg parses the .msg schemas (ROS 2 mode) and npm
//     @foxglove/rosmsg2-serialization MessageWriter writes the CDR payloads;
//     its MessageReader reads each back: what it reads is the expected value;
//   - JSON payloads are written by JSON.stringify and read back by JSON.parse.
// Output (committed, so the Go tests never need node), in ../recordings/:
//   arm.mcap            chunked, indexed, with a Metadata record "robot";
//   arm-unindexed.mcap  the same messages without chunks, index or summary;
//   expected.json       every message: topic, times, encodings, schema, the
//                       payload (base64) and its decoded value.
// Run from testdata/node: `node recording-fixtures.mjs`.
import { mkdirSync, writeFileSync } from "node:fs";
import { dirname, join } from "node:path";
import { fileURLToPath } from "node:url";
import { McapWriter } from "@mcap/core";
import { parse } from "@foxglove/rosmsg";
import { MessageReader, MessageWriter } from "@foxglove/rosmsg2-serialization";

const out = join(dirname(fileURLToPath(import.meta.url)), "..", "recordings");
mkdirSync(out, { recursive: true });

const SEP = "=".repeat(80);
const dep = (name, text) => `${SEP}\nMSG: ${name}\n${text}`;
const TIME = "int32 sec\nuint32 nanosec\n";
const HEADER = "builtin_interfaces/Time stamp\nstring frame_id\n";

const schemas = {
  joints: {
    name: "sensor_msgs/msg/JointState",
    encoding: "ros2msg",
    text:
      "std_msgs/Header header\nstring[] name\nfloat64[] position\nfloat64[] velocity\nfloat64[] effort\n" +
      dep("std_msgs/Header", HEADER) +
      dep("builtin_interfaces/Time", TIME),
  },
  image: {
    name: "sensor_msgs/msg/CompressedImage",
    encoding: "ros2msg",
    text: "std_msgs/Header header\nstring format\nuint8[] data\n" + dep("std_msgs/Header", HEADER) + dep("builtin_interfaces/Time", TIME),
  },
};
for (const s of Object.values(schemas)) {
  const defs = parse(s.text, { ros2: true });
  s.writer = new MessageWriter(defs);
  s.reader = new MessageReader(defs);
}

const BASE = 1_700_000_000_000_000_000n; // an invented epoch time, ns
const ms = (n) => BASE + BigInt(n) * 1_000_000n;
const stamp = (t) => ({ sec: Number(t / 1_000_000_000n), nanosec: Number(t % 1_000_000_000n) });

// The messages, in the order they are written (time order).
const msgs = [];
const cdr = (topic, schema, t, value) => msgs.push({ topic, schema, encoding: "cdr", t, value });
const json = (topic, t, value) => msgs.push({ topic, schema: null, encoding: "json", t, value });

json("/session/task", ms(0), { name: "stack blocks" });
json("/session/event", ms(0), { kind: "start" });
for (let k = 0; k <= 30; k++) {
  const t = ms(10 * k); // joints at 100 Hz for 300 ms
  cdr("/arm/joints", "joints", t, {
    header: { stamp: stamp(t), frame_id: "base" },
    name: ["j1", "j2", "j3", "j4", "j5", "j6", "j7"],
    position: [0, 1, 2, 3, 4, 5, 6].map((j) => j + k / 8),
    velocity: [],
    effort: [],
  });
  if (k % 2 === 0) json("/arm/command", t, { velocity: [1, 2, 3, 4, 5, 6, 7].map((j) => j * 0.25 - k / 16) });
  if (k % 5 === 0) {
    cdr("/wrist/image", "image", t, {
      header: { stamp: stamp(t), frame_id: "wrist" },
      format: "jpeg",
      data: Uint8Array.from([0xff, 0xd8, 0xff, 0xe0, k, 0xff, 0xd9]),
    });
  }
}
json("/session/event", ms(300), { kind: "end" });

const b64 = (u8) => Buffer.from(u8).toString("base64");
// plain turns a decoded value into JSON: bytes as {"bytes_b64": ...}.
const plain = (v) => {
  if (v instanceof Uint8Array) return { bytes_b64: b64(v) };
  if (ArrayBuffer.isView(v)) return Array.from(v);
  if (Array.isArray(v)) return v.map(plain);
  if (typeof v === "bigint") return v.toString();
  if (v && typeof v === "object") return Object.fromEntries(Object.entries(v).map(([k, x]) => [k, plain(x)]));
  return v;
};

for (const m of msgs) {
  if (m.encoding === "cdr") {
    m.data = schemas[m.schema].writer.writeMessage(m.value);
    m.decoded = plain(schemas[m.schema].reader.readMessage(m.data));
  } else {
    m.data = new TextEncoder().encode(JSON.stringify(m.value));
    m.decoded = JSON.parse(new TextDecoder().decode(m.data));
  }
}

async function write(file, opts) {
  const parts = [];
  let pos = 0n;
  const writable = {
    write: async (buf) => {
      parts.push(Buffer.from(buf));
      pos += BigInt(buf.byteLength);
    },
    position: () => pos,
  };
  const w = new McapWriter({ writable, chunkSize: 1024, ...opts });
  await w.start({ profile: "ros2", library: "hindcast fixtures (@mcap/core)" });
  await w.addMetadata({ name: "robot", metadata: new Map([["unit", "arm-07"], ["model", "picker6"]]) });
  const schemaIds = {};
  for (const [k, s] of Object.entries(schemas)) {
    schemaIds[k] = await w.registerSchema({ name: s.name, encoding: s.encoding, data: new TextEncoder().encode(s.text) });
  }
  const chans = {};
  let seq = 0;
  for (const m of msgs) {
    if (!(m.topic in chans)) {
      chans[m.topic] = await w.registerChannel({
        topic: m.topic,
        messageEncoding: m.encoding,
        schemaId: m.schema ? schemaIds[m.schema] : 0,
        metadata: new Map(),
      });
    }
    await w.addMessage({ channelId: chans[m.topic], sequence: seq++, logTime: m.t, publishTime: m.t, data: m.data });
  }
  await w.end();
  writeFileSync(join(out, file), Buffer.concat(parts));
}

await write("arm.mcap", {});
await write("arm-unindexed.mcap", {
  useChunks: false,
  useStatistics: false,
  useSummaryOffsets: false,
  useMessageIndex: false,
  useChunkIndex: false,
  useMetadataIndex: false,
  useAttachmentIndex: false,
  repeatSchemas: false,
  repeatChannels: false,
});

const expected = {
  writers: "MCAP by npm @mcap/core; CDR by npm @foxglove/rosmsg2-serialization from .msg parsed by npm @foxglove/rosmsg",
  metadata: { robot: { unit: "arm-07", model: "picker6" } },
  schemas: Object.fromEntries(Object.entries(schemas).map(([k, s]) => [k, { name: s.name, encoding: s.encoding, text: s.text }])),
  messages: msgs.map((m) => ({
    topic: m.topic,
    log_time: m.t.toString(),
    message_encoding: m.encoding,
    schema: m.schema,
    data_b64: b64(m.data),
    decoded: m.decoded,
  })),
};
writeFileSync(join(out, "expected.json"), JSON.stringify(expected, null, 1) + "\n");
