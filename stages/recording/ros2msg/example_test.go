package ros2msg_test

import (
	"fmt"

	"hindcast/stages/recording/ros2msg"
)

// A channel's schema is parsed once; each message of the topic is decoded
// with it.
func ExampleSchema_Decode() {
	schema := "std_msgs/Header header\nfloat64[] position\n" +
		"================================================================================\n" +
		"MSG: std_msgs/Header\nbuiltin_interfaces/Time stamp\nstring frame_id\n"
	s, err := ros2msg.Parse("hindcast_example/msg/Arm", []byte(schema))
	if err != nil {
		panic(err)
	}
	payload, err := s.Encode(map[string]any{
		"header":   map[string]any{"stamp": map[string]any{"sec": 12, "nanosec": 500}, "frame_id": "base"},
		"position": []float64{0.5, -1.25},
	}, false)
	if err != nil {
		panic(err)
	}
	v, err := s.Decode(payload)
	if err != nil {
		panic(err)
	}
	fmt.Println(s.Name, len(payload), "bytes")
	fmt.Println(v["position"], v["header"].(map[string]any)["frame_id"])
	// Output:
	// hindcast_example/Arm 44 bytes
	// [0.5 -1.25] base
}
