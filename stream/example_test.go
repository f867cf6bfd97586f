package stream_test

import (
	"context"
	"fmt"
	"os"

	"freshet.dev/freshet/stream"
)

func ExampleJSONDecoder() {
	d := stream.NewJSONDecoder(stream.DecodeOptions{MinValue: 0.5, MaxValue: 5})
	var b stream.Batch
	err := d.Decode([]byte(`{"user":"listener-17","item":"show-4","value":4.5,"time":"2026-01-01T00:00:00Z"}`), &b)
	fmt.Println(err, b.Len(), string(b.Events[0].User), b.Events[0].Time)
	err = d.Decode([]byte(`{"user":"listener-17","item":"show-4","value":9}`), &b)
	fmt.Println(err)
	fmt.Println(string(stream.AppendJSON(nil, &b.Events[0])))
	// Output:
	// <nil> 1 listener-17 1767225600000
	// stream: field "value": out of scale [0.5, 5]: 9
	// {"user":"listener-17","item":"show-4","value":4.5,"time":1767225600000}
}

func ExampleNewScenario() {
	s, err := stream.NewScenario(stream.ScenarioOptions{Seed: 42, Events: 3, ClipMin: 0.5, ClipMax: 5, Step: 0.5}, stream.Position{})
	if err != nil {
		fmt.Println(err)
		return
	}
	b, _ := s.Next(context.Background())
	fmt.Println(b.Len(), b.Pos)
	if _, err := s.WriteTo(os.Stdout); err != nil { // nothing left: all 3 events were read
		fmt.Println(err)
	}
	// Output:
	// 3 scenario seed 42 event 3
}
