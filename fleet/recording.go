package fleet

import (
	"fmt"
	"io"

	"github.com/foxglove/mcap/go/mcap"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protodesc"
	"google.golang.org/protobuf/reflect/protoreflect"
	"google.golang.org/protobuf/types/descriptorpb"
	"google.golang.org/protobuf/types/dynamicpb"

	"hindcast/stages/recording/ros2msg"
)

// ROS 2 message definitions of the fleet's CDR topics (SPEC §7.2: a `.msg`
// definition, dependencies after lines of `=` headed `MSG: package/Type`).
// The layouts are the ones ROS 2 publishes for sensor_msgs/JointState and
// sensor_msgs/CompressedImage (from memory); the drive command is our own.
const (
	rosSep    = "================================================================================\n"
	rosHeader = rosSep + "MSG: std_msgs/Header\nbuiltin_interfaces/Time stamp\nstring frame_id\n"

	jointStateName = "sensor_msgs/msg/JointState"
	jointStateMsg  = "std_msgs/Header header\nstring[] name\nfloat64[] position\nfloat64[] velocity\nfloat64[] effort\n" + rosHeader

	compressedImageName = "sensor_msgs/msg/CompressedImage"
	compressedImageMsg  = "std_msgs/Header header\nstring format\nuint8[] data\n" + rosHeader

	driveName = "larkspur_msgs/msg/Drive"
	driveMsg  = "std_msgs/Header header\nfloat64 throttle\nfloat64 steer\n" + rosHeader
)

// Protobuf message names of the fleet's protobuf topics; their descriptors are
// built in protoSchemas, not generated from .proto files.
const (
	poseName     = "larkspur.fleet.Pose"
	odometryName = "larkspur.fleet.Odometry"
	commandName  = "larkspur.fleet.ArmCommand"
)

// codecs holds the parsed schemas every recording of a run shares, so a
// topic's payloads are encoded without re-parsing its definition.
type codecs struct {
	joints, image, drive *ros2msg.Schema
	protoSet             []byte // serialized FileDescriptorSet of the larkspur.fleet messages
	pose, odom, command  protoreflect.MessageDescriptor
	marshal              proto.MarshalOptions
}

func newCodecs() (*codecs, error) {
	c := &codecs{marshal: proto.MarshalOptions{Deterministic: true}}
	var err error
	if c.joints, err = ros2msg.Parse(jointStateName, []byte(jointStateMsg)); err != nil {
		return nil, fmt.Errorf("fleet: parsing %s: %w", jointStateName, err)
	}
	if c.image, err = ros2msg.Parse(compressedImageName, []byte(compressedImageMsg)); err != nil {
		return nil, fmt.Errorf("fleet: parsing %s: %w", compressedImageName, err)
	}
	if c.drive, err = ros2msg.Parse(driveName, []byte(driveMsg)); err != nil {
		return nil, fmt.Errorf("fleet: parsing %s: %w", driveName, err)
	}
	fdp := protoSchemas()
	fd, err := protodesc.NewFile(fdp, nil)
	if err != nil {
		return nil, fmt.Errorf("fleet: building protobuf descriptors: %w", err)
	}
	msgs := fd.Messages()
	c.pose, c.odom, c.command = msgs.ByName("Pose"), msgs.ByName("Odometry"), msgs.ByName("ArmCommand")
	c.protoSet, err = c.marshal.Marshal(&descriptorpb.FileDescriptorSet{File: []*descriptorpb.FileDescriptorProto{fdp}})
	if err != nil {
		return nil, fmt.Errorf("fleet: serializing FileDescriptorSet: %w", err)
	}
	return c, nil
}

// protoSchemas describes, in proto3, the messages
//
//	message Pose { int64 stamp = 1; repeated double position = 2; repeated double orientation = 3; }
//	message Odometry { int64 stamp = 1; repeated double state = 2; }
//	message ArmCommand { int64 stamp = 1; repeated double velocity = 2; float gripper = 3; }
func protoSchemas() *descriptorpb.FileDescriptorProto {
	field := func(name string, n int32, t descriptorpb.FieldDescriptorProto_Type, repeated bool) *descriptorpb.FieldDescriptorProto {
		l := descriptorpb.FieldDescriptorProto_LABEL_OPTIONAL
		if repeated {
			l = descriptorpb.FieldDescriptorProto_LABEL_REPEATED
		}
		return &descriptorpb.FieldDescriptorProto{Name: proto.String(name), Number: proto.Int32(n), Type: t.Enum(), Label: l.Enum(), JsonName: proto.String(name)}
	}
	i64, dbl, flt := descriptorpb.FieldDescriptorProto_TYPE_INT64, descriptorpb.FieldDescriptorProto_TYPE_DOUBLE, descriptorpb.FieldDescriptorProto_TYPE_FLOAT
	return &descriptorpb.FileDescriptorProto{
		Name:    proto.String("larkspur/fleet.proto"),
		Package: proto.String("larkspur.fleet"),
		Syntax:  proto.String("proto3"),
		MessageType: []*descriptorpb.DescriptorProto{
			{Name: proto.String("Pose"), Field: []*descriptorpb.FieldDescriptorProto{
				field("stamp", 1, i64, false), field("position", 2, dbl, true), field("orientation", 3, dbl, true)}},
			{Name: proto.String("Odometry"), Field: []*descriptorpb.FieldDescriptorProto{
				field("stamp", 1, i64, false), field("state", 2, dbl, true)}},
			{Name: proto.String("ArmCommand"), Field: []*descriptorpb.FieldDescriptorProto{
				field("stamp", 1, i64, false), field("velocity", 2, dbl, true), field("gripper", 3, flt, false)}},
		},
	}
}

// protoMsg encodes a message of type md whose fields are set from vals: an
// int64 or float32 for a singular field, a []float64 for a repeated double.
func (c *codecs) protoMsg(md protoreflect.MessageDescriptor, vals map[string]any) ([]byte, error) {
	m := dynamicpb.NewMessage(md)
	for name, v := range vals {
		fd := md.Fields().ByName(protoreflect.Name(name))
		if fd == nil {
			return nil, fmt.Errorf("fleet: %s has no field %s", md.FullName(), name)
		}
		switch x := v.(type) {
		case int64:
			m.Set(fd, protoreflect.ValueOfInt64(x))
		case float32:
			m.Set(fd, protoreflect.ValueOfFloat32(x))
		case []float64:
			l := m.Mutable(fd).List()
			for _, e := range x {
				l.Append(protoreflect.ValueOfFloat64(e))
			}
		default:
			return nil, fmt.Errorf("fleet: value %T for %s.%s", v, md.FullName(), name)
		}
	}
	return c.marshal.Marshal(m)
}

// rosStamp is a std_msgs/Header for time t.
func rosStamp(t int64, frame string) map[string]any {
	return map[string]any{"stamp": map[string]any{"sec": int32(t / 1e9), "nanosec": uint32(t % 1e9)}, "frame_id": frame}
}

// channel is one topic of a recording with its schema.
type channel struct {
	topic      string
	encoding   string // message encoding: cdr, protobuf or json
	schemaName string // "" for schemaless JSON
	schemaEnc  string // ros2msg, protobuf or jsonschema
	schema     []byte
}

// Channels of the fleet's topics, by the codec that encodes them.
func (c *codecs) cdrChannel(topic, name, def string) channel {
	return channel{topic: topic, encoding: "cdr", schemaName: name, schemaEnc: "ros2msg", schema: []byte(def)}
}

func (c *codecs) protoChannel(topic string, md protoreflect.MessageDescriptor) channel {
	return channel{topic: topic, encoding: "protobuf", schemaName: string(md.FullName()), schemaEnc: "protobuf", schema: c.protoSet}
}

func jsonChannel(topic string) channel { return channel{topic: topic, encoding: "json"} }

// recMessage is one message before it is written: its channel (index into the
// recording's channels), its time (log_time = publish_time) and payload.
type recMessage struct {
	ch   int
	t    int64
	data []byte
}

// recWriter writes one MCAP recording: header, a Metadata record "robot"
// naming the unit and its model, schemas and channels, then messages in the
// order given. The mcap library's writer keeps one chunk in memory at a time.
type recWriter struct {
	w        *mcap.Writer
	channels []channel
	seq      []uint32
}

// recOptions chooses how a recording is laid out.
type recOptions struct {
	compression mcap.CompressionFormat // "" writes chunks uncompressed
	chunkSize   int64
	unchunked   bool // no chunks, no index: messages stand in the data section
}

func newRecWriter(out io.Writer, meta map[string]string, channels []channel, opt recOptions) (*recWriter, error) {
	cs := opt.chunkSize
	if cs == 0 {
		cs = 256 << 10
	}
	w, err := mcap.NewWriter(out, &mcap.WriterOptions{
		IncludeCRC: true, Chunked: !opt.unchunked, ChunkSize: cs, Compression: opt.compression,
		CompressionLevel: mcap.CompressionLevelFastest, OverrideLibrary: true,
	})
	if err != nil {
		return nil, fmt.Errorf("fleet: creating recording writer: %w", err)
	}
	if err := w.WriteHeader(&mcap.Header{Profile: "ros2", Library: "hindcast fleet"}); err != nil {
		return nil, fmt.Errorf("fleet: writing recording header: %w", err)
	}
	if meta != nil {
		if err := w.WriteMetadata(&mcap.Metadata{Name: "robot", Metadata: meta}); err != nil {
			return nil, fmt.Errorf("fleet: writing recording metadata: %w", err)
		}
	}
	schemaIDs := map[string]uint16{}
	for i, ch := range channels {
		var sid uint16
		if ch.schemaName != "" {
			key := ch.schemaEnc + "\x00" + ch.schemaName
			if sid = schemaIDs[key]; sid == 0 {
				sid = uint16(len(schemaIDs) + 1)
				schemaIDs[key] = sid
				if err := w.WriteSchema(&mcap.Schema{ID: sid, Name: ch.schemaName, Encoding: ch.schemaEnc, Data: ch.schema}); err != nil {
					return nil, fmt.Errorf("fleet: writing schema %s: %w", ch.schemaName, err)
				}
			}
		}
		if err := w.WriteChannel(&mcap.Channel{ID: uint16(i), SchemaID: sid, Topic: ch.topic, MessageEncoding: ch.encoding, Metadata: map[string]string{}}); err != nil {
			return nil, fmt.Errorf("fleet: writing channel %s: %w", ch.topic, err)
		}
	}
	return &recWriter{w: w, channels: channels, seq: make([]uint32, len(channels))}, nil
}

func (r *recWriter) write(m recMessage) error {
	r.seq[m.ch]++
	err := r.w.WriteMessage(&mcap.Message{ChannelID: uint16(m.ch), Sequence: r.seq[m.ch], LogTime: uint64(m.t), PublishTime: uint64(m.t), Data: m.data})
	if err != nil {
		return fmt.Errorf("fleet: writing message on %s: %w", r.channels[m.ch].topic, err)
	}
	return nil
}

func (r *recWriter) close() error {
	if err := r.w.Close(); err != nil {
		return fmt.Errorf("fleet: closing recording: %w", err)
	}
	return nil
}
