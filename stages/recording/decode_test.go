package recording

import (
	"context"
	"encoding/json"
	"math"
	"reflect"
	"testing"

	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protodesc"
	"google.golang.org/protobuf/reflect/protoreflect"
	"google.golang.org/protobuf/types/descriptorpb"
	"google.golang.org/protobuf/types/dynamicpb"

	"hindcast/pipeline"
	"hindcast/stages/recording/mcapread"
)

// armFDS is a FileDescriptorSet built with descriptorpb: message
// demo.Arm {repeated double position=1; Mode mode=2; bytes image=3;
// string name=4; float speed=5; Pose pose=6} in proto3.
func armFDS(t testing.TB) (*descriptorpb.FileDescriptorSet, protoreflect.MessageDescriptor) {
	t.Helper()
	lbl := func(l descriptorpb.FieldDescriptorProto_Label) *descriptorpb.FieldDescriptorProto_Label { return &l }
	typ := func(x descriptorpb.FieldDescriptorProto_Type) *descriptorpb.FieldDescriptorProto_Type { return &x }
	opt, rep := descriptorpb.FieldDescriptorProto_LABEL_OPTIONAL, descriptorpb.FieldDescriptorProto_LABEL_REPEATED
	fd := &descriptorpb.FileDescriptorProto{
		Name: proto.String("demo/arm.proto"), Package: proto.String("demo"), Syntax: proto.String("proto3"),
		EnumType: []*descriptorpb.EnumDescriptorProto{{
			Name: proto.String("Mode"),
			Value: []*descriptorpb.EnumValueDescriptorProto{
				{Name: proto.String("IDLE"), Number: proto.Int32(0)},
				{Name: proto.String("MOVING"), Number: proto.Int32(1)},
			},
		}},
		MessageType: []*descriptorpb.DescriptorProto{
			{Name: proto.String("Pose"), Field: []*descriptorpb.FieldDescriptorProto{
				{Name: proto.String("xyz"), Number: proto.Int32(1), Label: lbl(rep), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_FLOAT)},
			}},
			{Name: proto.String("Arm"), Field: []*descriptorpb.FieldDescriptorProto{
				{Name: proto.String("position"), Number: proto.Int32(1), Label: lbl(rep), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_DOUBLE)},
				{Name: proto.String("mode"), Number: proto.Int32(2), Label: lbl(opt), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_ENUM), TypeName: proto.String(".demo.Mode")},
				{Name: proto.String("image"), Number: proto.Int32(3), Label: lbl(opt), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_BYTES)},
				{Name: proto.String("name"), Number: proto.Int32(4), Label: lbl(opt), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_STRING)},
				{Name: proto.String("speed"), Number: proto.Int32(5), Label: lbl(opt), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_FLOAT)},
				{Name: proto.String("pose"), Number: proto.Int32(6), Label: lbl(opt), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_MESSAGE), TypeName: proto.String(".demo.Pose")},
				{Name: proto.String("count"), Number: proto.Int32(7), Label: lbl(opt), Type: typ(descriptorpb.FieldDescriptorProto_TYPE_SINT64)},
			}},
		},
	}
	fds := &descriptorpb.FileDescriptorSet{File: []*descriptorpb.FileDescriptorProto{fd}}
	files, err := protodesc.NewFiles(fds)
	if err != nil {
		t.Fatal(err)
	}
	d, err := files.FindDescriptorByName("demo.Arm")
	if err != nil {
		t.Fatal(err)
	}
	return fds, d.(protoreflect.MessageDescriptor)
}

func TestProtobufDecode(t *testing.T) {
	fds, md := armFDS(t)
	schema, err := proto.Marshal(fds)
	if err != nil {
		t.Fatal(err)
	}
	// The payload is marshaled by google.golang.org/protobuf (dynamicpb).
	m := dynamicpb.NewMessage(md)
	f := md.Fields()
	l := m.Mutable(f.ByName("position")).List()
	for _, x := range []float64{0.5, -1.25, 3} {
		l.Append(protoreflect.ValueOfFloat64(x))
	}
	m.Set(f.ByName("mode"), protoreflect.ValueOfEnum(1))
	m.Set(f.ByName("image"), protoreflect.ValueOfBytes([]byte{0xff, 0xd8, 0xff}))
	m.Set(f.ByName("count"), protoreflect.ValueOfInt64(-7))
	pose := m.Mutable(f.ByName("pose")).Message()
	pl := pose.Mutable(md.Fields().ByName("pose").Message().Fields().ByName("xyz")).List()
	pl.Append(protoreflect.ValueOfFloat32(1.5))
	pl.Append(protoreflect.ValueOfFloat32(2.5))
	payload, err := proto.Marshal(m)
	if err != nil {
		t.Fatal(err)
	}
	dec, err := newDecoder(&mcapread.Channel{Topic: "/arm", MessageEncoding: "protobuf",
		Schema: &mcapread.Schema{Name: "demo.Arm", Encoding: "protobuf", Data: schema}})
	if err != nil {
		t.Fatal(err)
	}
	v, err := dec(payload)
	if err != nil {
		t.Fatal(err)
	}
	get := func(p string) any {
		t.Helper()
		steps, err := pipeline.ParseFieldPath(p)
		if err != nil {
			t.Fatal(err)
		}
		w, err := walk(v, steps)
		if err != nil {
			t.Fatalf("%s: %v", p, err)
		}
		return w
	}
	nums := func(p string) []float64 {
		t.Helper()
		n, err := numbers(nil, get(p))
		if err != nil {
			t.Fatalf("%s: %v", p, err)
		}
		return n
	}
	if got := nums("position"); !reflect.DeepEqual(got, []float64{0.5, -1.25, 3}) {
		t.Errorf("position %v", got)
	}
	if got := nums("position[1:3]"); !reflect.DeepEqual(got, []float64{-1.25, 3}) {
		t.Errorf("position[1:3] %v", got)
	}
	if got := nums("position[2]"); !reflect.DeepEqual(got, []float64{3}) {
		t.Errorf("position[2] %v", got)
	}
	if got := nums("pose.xyz"); !reflect.DeepEqual(got, []float64{1.5, 2.5}) {
		t.Errorf("pose.xyz %v", got)
	}
	if got := nums("count"); !reflect.DeepEqual(got, []float64{-7}) {
		t.Errorf("count %v", got)
	}
	// An enum gives its value's name (SPEC §7.3).
	if got := get("mode"); got != "MOVING" {
		t.Errorf("mode %v", got)
	}
	if b, err := imageBytes(get("image")); err != nil || !reflect.DeepEqual(b, []byte{0xff, 0xd8, 0xff}) {
		t.Errorf("image %v %v", b, err)
	}
	// Unset proto3 fields read as their defaults (protobuf language guide, proto3).
	if got := nums("speed"); !reflect.DeepEqual(got, []float64{0}) {
		t.Errorf("speed %v", got)
	}
	if got := get("name"); got != "" {
		t.Errorf("name %v", got)
	}
	// A field the type does not have is missing.
	steps, _ := pipeline.ParseFieldPath("nope")
	if _, err := walk(v, steps); err == nil {
		t.Error("missing field found")
	}
	// Bad bytes are undecodable.
	if _, err := dec([]byte{0x0a, 0xff}); err == nil {
		t.Error("truncated payload decoded")
	}
	// A schema that cannot be parsed, or an unknown name, is no decoder.
	for _, s := range []*mcapread.Schema{
		{Name: "demo.Arm", Encoding: "protobuf", Data: []byte{0xff}},
		{Name: "demo.Leg", Encoding: "protobuf", Data: schema},
	} {
		if _, err := newDecoder(&mcapread.Channel{MessageEncoding: "protobuf", Schema: s}); err == nil {
			t.Errorf("schema %s decoded", s.Name)
		}
	}
}

func TestUnsupportedEncoding(t *testing.T) {
	for _, ch := range []*mcapread.Channel{
		{MessageEncoding: "msgpack"},
		{MessageEncoding: "cdr"},
		{MessageEncoding: "cdr", Schema: &mcapread.Schema{Name: "a/B", Encoding: "ros2msg", Data: []byte("not a type line !!")}},
	} {
		if _, err := newDecoder(ch); err == nil {
			t.Errorf("%+v: decoder built", ch)
		}
	}
}

func TestCDRDecode(t *testing.T) {
	// A sensor_msgs/JointState-like type with a fixed little-endian payload
	// laid out by hand per the OMG CDR rules (XCDR1, 4-byte header 00 01 00 00).
	ch := &mcapread.Channel{MessageEncoding: "cdr", Schema: &mcapread.Schema{Name: "demo/Joint", Encoding: "ros2msg",
		Data: []byte("float64[] position\nuint8[] data\n")}}
	dec, err := newDecoder(ch)
	if err != nil {
		t.Fatal(err)
	}
	p := []byte{0, 1, 0, 0, // encapsulation: CDR_LE
		2, 0, 0, 0, // sequence length 2
		0, 0, 0, 0, // pad to 8
		0, 0, 0, 0, 0, 0, 0xf8, 0x3f, // 1.5
		0, 0, 0, 0, 0, 0, 0x04, 0xc0, // -2.5
		3, 0, 0, 0, 7, 8, 9}
	v, err := dec(p)
	if err != nil {
		t.Fatal(err)
	}
	steps, _ := pipeline.ParseFieldPath("position")
	w, _ := walk(v, steps)
	if n, err := numbers(nil, w); err != nil || !reflect.DeepEqual(n, []float64{1.5, -2.5}) {
		t.Errorf("position %v %v", n, err)
	}
	steps, _ = pipeline.ParseFieldPath("data")
	w, _ = walk(v, steps)
	if b, err := imageBytes(w); err != nil || !reflect.DeepEqual(b, []byte{7, 8, 9}) {
		t.Errorf("data %v %v", b, err)
	}
}

func TestParseJSON(t *testing.T) {
	// RFC 8259 values plus the bare tokens of SPEC §1.
	v, err := parseJSON([]byte(` {"a":[1,-2.5e1,NaN,Infinity,-Infinity],"s":"x\u00e9\n","b":true,"n":null,"o":{"k":[{"z":0}]}} `))
	if err != nil {
		t.Fatal(err)
	}
	m := v.(map[string]any)
	a := m["a"].([]float64)
	if len(a) != 5 || a[0] != 1 || a[1] != -25 || !math.IsNaN(a[2]) || !math.IsInf(a[3], 1) || !math.IsInf(a[4], -1) {
		t.Errorf("a %v", a)
	}
	if m["s"] != "xé\n" || m["b"] != true || m["n"] != nil {
		t.Errorf("%v", m)
	}
	for _, bad := range []string{``, `{`, `[1,]`, `01`, `+1`, `.5`, `1.`, `"a`, `{"a" 1}`, `nan`, `[1] x`, "\"\x01\""} {
		if _, err := parseJSON([]byte(bad)); err == nil {
			t.Errorf("%q parsed", bad)
		}
	}
}

// FuzzJSONPath checks that the JSON decoder and path walk never panic and
// agree with encoding/json (RFC 8259) on numbers wherever the standard
// library accepts the input.
func FuzzJSONPath(f *testing.F) {
	f.Add([]byte(`{"x":[1,2,3]}`), "x[0:2]")
	f.Add([]byte(`{"a":{"b":[{"c":NaN}]}}`), "a.b[0].c")
	f.Add([]byte(`[1,2]`), "x")
	f.Fuzz(func(t *testing.T, data []byte, path string) {
		v, err := parseJSON(data)
		var std any
		stdErr := json.Unmarshal(data, &std)
		if stdErr == nil && err != nil {
			t.Fatalf("encoding/json accepts %q, parseJSON does not: %v", data, err)
		}
		if err != nil {
			return
		}
		steps, err := pipeline.ParseFieldPath(path)
		if err != nil {
			return
		}
		w, err := walk(v, steps)
		if err != nil {
			return
		}
		n, nerr := numbers(nil, w)
		if stdErr != nil || nerr != nil {
			return
		}
		// The same path through encoding/json's tree gives the same numbers.
		sw, err := walkStd(std, steps)
		if err != nil {
			t.Fatalf("path %q found by parseJSON only", path)
		}
		if !reflect.DeepEqual(n, sw) {
			t.Fatalf("%q %q: %v vs encoding/json %v", data, path, n, sw)
		}
	})
}

// walkStd follows a path through encoding/json's tree and returns numbers.
func walkStd(v any, steps []pipeline.PathStep) ([]float64, error) {
	for _, st := range steps {
		switch {
		case st.Name != "":
			m, ok := v.(map[string]any)
			if !ok {
				return nil, errField
			}
			if v, ok = m[st.Name]; !ok {
				return nil, errField
			}
		case st.Index:
			a, ok := v.([]any)
			if !ok || st.I >= len(a) {
				return nil, errField
			}
			v = a[st.I]
		case st.Slice:
			a, ok := v.([]any)
			if !ok || st.Hi > len(a) || st.Lo > st.Hi {
				return nil, errField
			}
			v = a[st.Lo:st.Hi]
		}
	}
	switch x := v.(type) {
	case float64:
		return []float64{x}, nil
	case []any:
		out := []float64{}
		for _, e := range x {
			f, ok := e.(float64)
			if !ok {
				return nil, errField
			}
			out = append(out, f)
		}
		return out, nil
	}
	return nil, errField
}

// BenchmarkAssemble measures ticks/s of the aligner over JSON messages:
// three sources at 100, 50 and 30 Hz on a 10 Hz clock-free rate.
func BenchmarkAssemble(b *testing.B) {
	emb := &pipeline.Embodiment{Obs: 10, Act: 7, Frames: &pipeline.FramesConfig{
		Rate: 10, MaxAge: pipeline.Duration(150e6),
		Obs: []pipeline.FieldSource{{Topic: "/joints", Field: "position"}, {Topic: "/pose", Field: "p[0:3]", Align: pipeline.AlignLinear}},
		Act: []pipeline.FieldSource{{Topic: "/cmd", Field: "v", Align: pipeline.AlignNext, MaxAge: pipeline.Duration(60e6)}},
	}}
	var msgs []rec
	const seconds = 60
	for ms := int64(0); ms < seconds*1000; ms++ {
		t := ms * 1e6
		if ms%10 == 0 {
			msgs = append(msgs, rec{"/joints", t, `{"position":[0.1,0.2,0.3,0.4,0.5,0.6,0.7]}`})
		}
		if ms%20 == 0 {
			msgs = append(msgs, rec{"/cmd", t, `{"v":[1,2,3,4,5,6,7]}`})
		}
		if ms%33 == 0 {
			msgs = append(msgs, rec{"/pose", t, `{"p":[1,2,3,4]}`})
		}
	}
	b.ResetTimer()
	var ticks int64
	for i := 0; i < b.N; i++ {
		st, err := run(context.Background(), emb, feedOf(msgs), func(*Tick) error { return nil })
		if err != nil {
			b.Fatal(err)
		}
		ticks += st.Ticks
	}
	b.ReportMetric(float64(ticks)/b.Elapsed().Seconds(), "ticks/s")
}

// TestParseJSONStringsAsEncodingJSON: strings of JSON messages unescape as
// encoding/json does (RFC 8259 §7): a surrogate pair is one character, a
// lone surrogate is U+FFFD and the escape after it is kept on its own.
func TestParseJSONStringsAsEncodingJSON(t *testing.T) {
	for _, in := range []string{`"\ud83d\ude00"`, `"\ud800\u0041"`, `"\udc00x"`, `"a\/b\"\\\b\f\r\t"`} {
		got, err := parseJSON([]byte(in))
		if err != nil {
			t.Fatalf("%s: %v", in, err)
		}
		var want string
		if err := json.Unmarshal([]byte(in), &want); err != nil {
			t.Fatal(err)
		}
		if got != want {
			t.Errorf("%s: %q, encoding/json gives %q", in, got, want)
		}
	}
	for _, bad := range []string{`"\x"`, `"\u12"`, `"\u12g4"`} {
		if _, err := parseJSON([]byte(bad)); err == nil {
			t.Errorf("%s parsed", bad)
		}
	}
}
