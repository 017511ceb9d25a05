package recording_test

import (
	"bytes"
	"fmt"
	"strings"
	"time"

	"surmise/daemon/recording"
)

func ExampleReadCSV() {
	const export = `time,T_tank,T_hx
2024-05-06T07:08:09.0Z,61.2,40.1
2024-05-06T07:08:09.1Z,61.3,
2024-05-06T07:08:09.2Z,Bad,40.3
`
	rec, err := recording.ReadCSV(strings.NewReader(export), "run.csv", recording.CSVOptions{})
	if err != nil {
		fmt.Println(err)
		return
	}
	for _, s := range rec.Samples {
		fmt.Println(s.Time.Format("15:04:05.0"), s.Signal, s.Value)
	}
	for _, is := range rec.Issues {
		fmt.Println(is)
	}
	// Output:
	// 07:08:09.0 T_tank 61.2
	// 07:08:09.0 T_hx 40.1
	// 07:08:09.1 T_tank 61.3
	// 07:08:09.2 T_hx 40.3
	// line 4: column "T_tank": "Bad" is not a number; skipped
}

func ExampleWriter() {
	var file bytes.Buffer
	w := recording.NewWriter(&file)
	t0 := time.Date(2024, 5, 6, 7, 8, 9, 0, time.UTC)
	_ = w.Write(t0, "plant.loop.t_tank", []byte("61.25"))
	_ = w.Write(t0.Add(100*time.Millisecond), "plant.loop.t_hx", []byte(`{"value": 40.5}`))
	_ = w.Close()
	fmt.Print(file.String())

	rec, err := recording.ReadJSONL(&file, "bus.jsonl")
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(len(rec.Messages), "messages on", rec.Subjects)
	// Output:
	// {"recv":"2024-05-06T07:08:09Z","subject":"plant.loop.t_tank","payload":"61.25"}
	// {"recv":"2024-05-06T07:08:09.1Z","subject":"plant.loop.t_hx","payload":"{\"value\": 40.5}"}
	// 2 messages on [plant.loop.t_tank plant.loop.t_hx]
}
