package ros2msg

import (
	"testing"
)

// BenchmarkDecode decodes the JointState fixture (7 joints) and a
// CompressedImage whose data is 45 KB (the fixture's schema, encoded here):
// the per-message cost of a 100 Hz topic and of a camera topic.
func BenchmarkDecode(b *testing.B) {
	fs := loadFixtures(b)
	get := func(name string) (*Schema, []byte) {
		for _, f := range fs {
			if f.File == name {
				s, err := Parse(f.Schema, f.text)
				if err != nil {
					b.Fatal(err)
				}
				return s, f.payload
			}
		}
		b.Fatalf("no fixture %s", name)
		return nil, nil
	}
	js, jp := get("joint_state")
	img, _ := get("compressed_image")
	data := make([]byte, 45<<10)
	for i := range data {
		data[i] = byte(i * 7)
	}
	ip, err := img.Encode(map[string]any{
		"header": map[string]any{"stamp": map[string]any{"sec": 1767225602, "nanosec": 1}, "frame_id": "wrist_camera"},
		"format": "jpeg", "data": data,
	}, false)
	if err != nil {
		b.Fatal(err)
	}
	for _, tc := range []struct {
		name string
		s    *Schema
		p    []byte
	}{{"JointState", js, jp}, {"CompressedImage45KB", img, ip}} {
		b.Run(tc.name, func(b *testing.B) {
			b.ReportAllocs()
			b.SetBytes(int64(len(tc.p)))
			for b.Loop() {
				if _, err := tc.s.Decode(tc.p); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
