// Writes the ROS 2 CDR fixtures of hindcast/stages/recording/ros2msg with
// an independent implementation:
//   - npm @foxglove/rosmsg parses each .msg schema (ROS 2 mode);
//   - npm @foxglove/rosmsg2-serialization MessageWriter writes the payload
//     (little-endian plain CDR, encapsulation 0x0001), and its MessageReader
//     reads it back: what it reads is the expected value tree (.json);
//   - npm @foxglove/cdr CdrWriter, driven field by field, writes the payloads
//     of the other encapsulations (big-endian CDR 0x0000, CDR2 0x0006/0x0007),
//     which MessageWriter cannot produce.
// Run from testdata/node: `node ros2cdr.mjs` (writes ../ros2msg/). The Go tests
// read the committed output and never need node.
//
// Strings are ASCII only: @foxglove/cdr 3.x sizes a string by its UTF-16
// length, so it would write a wrong length for other text.
import { mkdirSync, writeFileSync } from "node:fs";
import { dirname, join } from "node:path";
import { fileURLToPath } from "node:url";
import { parse } from "@foxglove/rosmsg";
import { MessageReader, MessageWriter } from "@foxglove/rosmsg2-serialization";
import { CdrWriter, EncapsulationKind } from "@foxglove/cdr";

const out = join(dirname(fileURLToPath(import.meta.url)), "..", "ros2msg");
mkdirSync(out, { recursive: true });

const SEP = "=".repeat(80);
const dep = (name, text) => `${SEP}\nMSG: ${name}\n${text}`;

const TIME = "int32 sec\nuint32 nanosec\n";
const HEADER = "builtin_interfaces/Time stamp\nstring frame_id\n";

// The texts follow what ROS 2 tools store in MCAP schemas (rosbag2: the main
// .msg, then each dependency), comments included.
const schemas = {
  joint_state: {
    name: "sensor_msgs/msg/JointState",
    text:
      "# This is a message that holds data to describe the state of a set of torque controlled joints.\n" +
      "std_msgs/Header header\n\nstring[] name\nfloat64[] position\nfloat64[] velocity\nfloat64[] effort\n" +
      dep("std_msgs/Header", "# Standard metadata for higher-level stamped data types.\n" + HEADER) +
      dep("builtin_interfaces/Time", "# Time indicates a specific point in time, relative to a clock's 0 point.\n" + TIME),
  },
  pose_stamped: {
    name: "geometry_msgs/msg/PoseStamped",
    text:
      "# A Pose with reference coordinate frame and timestamp\n\nstd_msgs/Header header\nPose pose\n" +
      dep("std_msgs/Header", HEADER) +
      dep("builtin_interfaces/Time", TIME) +
      dep("geometry_msgs/Pose", "# A representation of pose in free space.\nPoint position\nQuaternion orientation\n") +
      dep("geometry_msgs/Point", "# This contains the position of a point in free space\nfloat64 x\nfloat64 y\nfloat64 z\n") +
      dep("geometry_msgs/Quaternion", "float64 x 0\nfloat64 y 0\nfloat64 z 0\nfloat64 w 1\n"),
  },
  compressed_image: {
    name: "sensor_msgs/msg/CompressedImage",
    text:
      "std_msgs/Header header # Header timestamp should be acquisition time of image\n" +
      "string format\nuint8[] data\n" +
      dep("std_msgs/Header", HEADER) +
      dep("builtin_interfaces/Time", TIME),
  },
  all_types: {
    name: "hindcast_test/msg/AllTypes",
    text: [
      "# every primitive, alone and in fixed, bounded and unbounded arrays",
      "int32 ANSWER=42",
      "string GREETING=\"hello # not a comment\"",
      "bool b",
      "byte by",
      "char ch",
      "int8 i8",
      "uint8 u8",
      "int16 i16",
      "uint16 u16",
      "int32 i32 7   # a default value, not on the wire",
      "uint32 u32",
      "int64 i64_min",
      "int64 i64_max",
      "uint64 u64_max",
      "float32 f32",
      "float64 f64",
      "float64 f64_inf",
      "float64 f64_ninf",
      "string s",
      "string<=10 s_bounded",
      "bool[3] b_fixed",
      "byte[2] by_fixed",
      "char[2] ch_fixed",
      "int8[3] i8_fixed",
      "uint8[3] u8_fixed",
      "int16[3] i16_fixed",
      "uint16[3] u16_fixed",
      "int32[3] i32_fixed",
      "uint32[3] u32_fixed",
      "int64[3] i64_fixed",
      "uint64[3] u64_fixed",
      "float32[3] f32_fixed",
      "float64[3] f64_fixed",
      "string[2] s_fixed",
      "bool[<=4] b_bounded",
      "int8[<=4] i8_bounded",
      "uint8[<=4] u8_bounded",
      "int16[<=4] i16_bounded",
      "uint16[<=4] u16_bounded",
      "int32[<=4] i32_bounded",
      "uint32[<=4] u32_bounded",
      "int64[<=4] i64_bounded",
      "uint64[<=4] u64_bounded",
      "float32[<=4] f32_bounded",
      "float64[<=4] f64_bounded",
      "string<=5[<=3] s_bounded_bounded",
      "bool[] b_seq",
      "int8[] i8_seq",
      "uint8[] u8_seq",
      "int16[] i16_seq",
      "uint16[] u16_seq",
      "int32[] i32_seq",
      "uint32[] u32_seq",
      "int64[] i64_seq",
      "uint64[] u64_seq",
      "float32[] f32_seq",
      "float64[] f64_seq",
      "float64[] f64_empty",
      "string[] s_seq",
      "Inner inner",
      "hindcast_test/Inner[2] inner_fixed",
      "hindcast_test/Inner[<=3] inner_bounded",
      "Inner[] inner_seq",
      "Empty empty",
      "uint8 tail",
      "",
    ].join("\n") +
      dep("hindcast_test/Inner", "uint8 tag\nfloat64 value\nstring label\nint16[] codes\n") +
      dep("hindcast_test/Empty", "# no fields: one uint8 on the wire\n"),
  },
};

const I64_MIN = -(2n ** 63n);
const I64_MAX = 2n ** 63n - 1n;
const U64_MAX = 2n ** 64n - 1n;

const inner = (tag, value, label, codes) => ({ tag, value, label, codes: new Int16Array(codes) });

const messages = {
  joint_state: {
    header: { stamp: { sec: 1767225600, nanosec: 123456789 }, frame_id: "base_link" },
    name: ["shoulder", "elbow", "wrist_1", "wrist_2", "wrist_3", "finger_l", "finger_r"],
    position: new Float64Array([0.1, -0.25, 1.5, -3.14159, 2.0e-9, 0.04, 0.0399]),
    velocity: new Float64Array([0, 0.5, -0.5, 1e-300, -1e300, 0, 0]),
    effort: new Float64Array([]),
  },
  pose_stamped: {
    header: { stamp: { sec: 1767225601, nanosec: 5 }, frame_id: "tool0" },
    pose: { position: { x: 0.31, y: -0.12, z: 0.875 }, orientation: { x: 0, y: 0, z: 0.7071067811865476, w: 0.7071067811865476 } },
  },
  compressed_image: {
    header: { stamp: { sec: 1767225602, nanosec: 999999999 }, frame_id: "wrist_camera" },
    format: "png",
    // a PNG signature and the start of an IHDR chunk: bytes only, not checked here
    data: new Uint8Array([0x89, 0x50, 0x4e, 0x47, 0x0d, 0x0a, 0x1a, 0x0a, 0, 0, 0, 13, 0x49, 0x48, 0x44, 0x52, 0, 0xff]),
  },
  all_types: {
    b: true,
    by: 255,
    ch: 65,
    i8: -128,
    u8: 200,
    i16: -32768,
    u16: 65535,
    i32: -2147483648,
    u32: 4294967295,
    i64_min: I64_MIN,
    i64_max: I64_MAX,
    u64_max: U64_MAX,
    f32: 0.1, // not exact in float32: the reader's value is Math.fround(0.1)
    f64: -2.5e-310, // subnormal
    f64_inf: Infinity,
    f64_ninf: -Infinity,
    s: "pick and place",
    s_bounded: "ten chars!",
    b_fixed: [true, false, true],
    by_fixed: new Uint8Array([0, 255]),
    ch_fixed: new Uint8Array([72, 105]),
    i8_fixed: new Int8Array([-1, 0, 127]),
    u8_fixed: new Uint8Array([1, 2, 3]),
    i16_fixed: new Int16Array([-2, 300, 32767]),
    u16_fixed: new Uint16Array([0, 1, 65535]),
    i32_fixed: new Int32Array([-3, 70000, 2147483647]),
    u32_fixed: new Uint32Array([0, 1, 4294967295]),
    i64_fixed: new BigInt64Array([I64_MIN, 0n, I64_MAX]),
    u64_fixed: new BigUint64Array([0n, 1n, U64_MAX]),
    f32_fixed: new Float32Array([1.5, -0.333, 3.4e38]),
    f64_fixed: new Float64Array([Number.MAX_VALUE, -0, Number.MIN_VALUE]),
    s_fixed: ["", "x"],
    b_bounded: [false],
    i8_bounded: new Int8Array([-5, 5]),
    u8_bounded: new Uint8Array([9]),
    i16_bounded: new Int16Array([1, -1, 2]),
    u16_bounded: new Uint16Array([4, 3, 2, 1]),
    i32_bounded: new Int32Array([-100000]),
    u32_bounded: new Uint32Array([100000, 7]),
    i64_bounded: new BigInt64Array([-9007199254740993n]),
    u64_bounded: new BigUint64Array([9007199254740993n, 18446744073709551614n]),
    f32_bounded: new Float32Array([0.25, 1e-45]),
    f64_bounded: new Float64Array([1 / 3]),
    s_bounded_bounded: ["ab", "abcde"],
    b_seq: [true, true, false, false, true],
    i8_seq: new Int8Array([1, -2, 3]),
    u8_seq: new Uint8Array([10, 20, 30, 40, 50, 60, 70]),
    i16_seq: new Int16Array([-7]),
    u16_seq: new Uint16Array([7, 8]),
    i32_seq: new Int32Array([1, 2, 3]),
    u32_seq: new Uint32Array([4]),
    i64_seq: new BigInt64Array([-1n, 1n]),
    u64_seq: new BigUint64Array([12345678901234567890n]),
    f32_seq: new Float32Array([-1.25, 100.5]),
    f64_seq: new Float64Array([6.02214076e23, -1.602176634e-19]),
    f64_empty: new Float64Array([]),
    s_seq: ["alpha", "", "gamma delta"],
    inner: inner(1, 0.5, "one", [1]),
    inner_fixed: [inner(2, -1, "", []), inner(3, 1e10, "three", [3, -3, 30])],
    inner_bounded: [inner(4, 4.4, "four", [4, 4])],
    inner_seq: [inner(5, 5, "five", []), inner(6, 6, "six", [6]), inner(7, -7, "seven", [-7, 7])],
    empty: {},
    tail: 170,
  },
};

// json turns the reader's values into JSON: bigints and non-finite floats as
// strings, typed arrays as arrays.
function json(v) {
  if (typeof v === "bigint") return v.toString();
  if (typeof v === "number") {
    if (Number.isNaN(v)) return "NaN";
    if (v === Infinity) return "Infinity";
    if (v === -Infinity) return "-Infinity";
    if (Object.is(v, -0)) return "-0";
    return v;
  }
  if (ArrayBuffer.isView(v)) return Array.from(v, json);
  if (Array.isArray(v)) return v.map(json);
  if (v !== null && typeof v === "object") {
    return Object.fromEntries(Object.entries(v).map(([k, x]) => [k, json(x)]));
  }
  return v;
}

const index = [];
function emit(file, schemaName, schemaText, payload, expected, writer) {
  writeFileSync(join(out, `${file}.cdr`), payload);
  writeFileSync(join(out, `${file}.json`), JSON.stringify(json(expected), null, 1) + "\n");
  index.push({ file, schema: schemaName, msg: schemaText, writer, encapsulation: payload[1] });
}

for (const [file, { name, text }] of Object.entries(schemas)) {
  writeFileSync(join(out, `${file}.msg`), text);
  const defs = parse(text, { ros2: true });
  const payload = new MessageWriter(defs).writeMessage(messages[file]);
  const decoded = new MessageReader(defs).readMessage(payload);
  emit(file, name, `${file}.msg`, payload, decoded, "@foxglove/rosmsg2-serialization MessageWriter");
}

// The other encapsulations, written value by value with @foxglove/cdr for
// a type whose layout exercises every alignment: each 8-byte value follows
// something that leaves the offset at 4 mod 8.
const mixedText =
  "uint8 a\nfloat64 b\nint16[] c\nstring d\nint64 e\nbool f\nuint64[2] g\nfloat32 h\nInner i\nfloat64[] j\n" +
  dep("hindcast_test/Inner", "int32 k\nfloat64 l\n");
writeFileSync(join(out, "mixed.msg"), mixedText);
const mixed = {
  a: 7, b: -0.5, c: [1, -2, 3], d: "cdr", e: -1234567890123n, f: true,
  g: [1n, 2n ** 63n], h: 0.75, i: { k: -9, l: 2.25 }, j: [1.5, -2.5],
};
const mixedKinds = {
  mixed_be: EncapsulationKind.CDR_BE,
  mixed_cdr2_be: EncapsulationKind.RTPS_CDR2_BE,
  mixed_cdr2_le: EncapsulationKind.RTPS_CDR2_LE,
};
for (const [file, kind] of Object.entries(mixedKinds)) {
  const w = new CdrWriter({ kind });
  w.uint8(mixed.a);
  w.float64(mixed.b);
  w.sequenceLength(mixed.c.length);
  for (const x of mixed.c) w.int16(x);
  w.string(mixed.d);
  w.int64(mixed.e);
  w.int8(mixed.f ? 1 : 0);
  for (const x of mixed.g) w.uint64(x);
  w.float32(mixed.h);
  w.int32(mixed.i.k);
  w.float64(mixed.i.l);
  w.sequenceLength(mixed.j.length);
  for (const x of mixed.j) w.float64(x);
  emit(file, "hindcast_test/msg/Mixed", "mixed.msg", w.data, mixed, "@foxglove/cdr CdrWriter");
}

writeFileSync(join(out, "index.json"), JSON.stringify(index, null, 1) + "\n");
console.log(`wrote ${index.length} payloads to ${out}`);
