package recording

import (
	"bytes"
	"fmt"
	"math"
	"strconv"
	"testing"
	"time"
)

// historianCSV generates rows of a 10 Hz recording of five signals with RFC
// 3339 times, the shape of a 24-hour historian export at rows = 864000.
func historianCSV(rows int) []byte {
	var b bytes.Buffer
	b.Grow(rows * 80)
	b.WriteString("time,T_tank,T_hx,T_cool,P_heater,F_pump\n")
	t0 := time.Date(2024, 5, 6, 0, 0, 0, 0, time.UTC)
	var buf []byte
	for k := 0; k < rows; k++ {
		buf = t0.Add(time.Duration(k)*100*time.Millisecond).AppendFormat(buf[:0], "2006-01-02T15:04:05.000Z07:00")
		b.Write(buf)
		for s := 0; s < 5; s++ {
			b.WriteByte(',')
			v := 40 + 10*float64(s) + math.Sin(float64(k)*1e-3*float64(s+1))
			b.Write(strconv.AppendFloat(buf[:0], v, 'f', 3, 64))
		}
		b.WriteByte('\n')
	}
	return b.Bytes()
}

func BenchmarkReadCSV(b *testing.B) {
	for _, rows := range []int{10_000, 864_000} {
		data := historianCSV(rows)
		b.Run(fmt.Sprintf("rows=%d", rows), func(b *testing.B) {
			b.SetBytes(int64(len(data)))
			b.ReportAllocs()
			for b.Loop() {
				rec, err := ReadCSV(bytes.NewReader(data), "bench.csv", CSVOptions{})
				if err != nil {
					b.Fatal(err)
				}
				if len(rec.Samples) != 5*rows {
					b.Fatalf("%d samples", len(rec.Samples))
				}
			}
		})
	}
}

func BenchmarkReadJSONL(b *testing.B) {
	var buf bytes.Buffer
	w := NewWriter(&buf)
	t0 := time.Date(2024, 5, 6, 0, 0, 0, 0, time.UTC)
	const n = 100_000
	for k := 0; k < n; k++ {
		p := strconv.AppendFloat(nil, 61+math.Sin(float64(k)*1e-3), 'f', 3, 64)
		if err := w.Write(t0.Add(time.Duration(k)*100*time.Millisecond), "plant.loop.t_tank", p); err != nil {
			b.Fatal(err)
		}
	}
	data := buf.Bytes()
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		rec, err := ReadJSONL(bytes.NewReader(data), "bench.jsonl")
		if err != nil || len(rec.Messages) != n {
			b.Fatal(err)
		}
	}
}

func BenchmarkWriter(b *testing.B) {
	var buf bytes.Buffer
	w := NewWriter(&buf)
	t0 := time.Date(2024, 5, 6, 0, 0, 0, 0, time.UTC)
	p := []byte("61.234")
	b.ReportAllocs()
	for b.Loop() {
		buf.Reset()
		if err := w.Write(t0, "plant.loop.t_tank", p); err != nil {
			b.Fatal(err)
		}
	}
}

// TestReadCSVAllocationBudget holds ReadCSV and ReadJSONL to a small
// fraction of an allocation per row or message: rows are split in place and
// the result is one slice.
func TestReadCSVAllocationBudget(t *testing.T) {
	if testing.Short() {
		t.Skip("allocation budget on 20000 rows")
	}
	const rows = 20_000
	data := historianCSV(rows)
	allocs := testing.AllocsPerRun(3, func() {
		if _, err := ReadCSV(bytes.NewReader(data), "a.csv", CSVOptions{}); err != nil {
			t.Fatal(err)
		}
	})
	if perRow := allocs / rows; perRow > 0.01 {
		t.Errorf("ReadCSV: %.4f allocations per row, want at most 0.01", perRow)
	}

	var buf bytes.Buffer
	w := NewWriter(&buf)
	for k := 0; k < rows; k++ {
		if err := w.Write(time.Unix(int64(k), 0), "s", []byte("61.2")); err != nil {
			t.Fatal(err)
		}
	}
	jl := buf.Bytes()
	allocs = testing.AllocsPerRun(3, func() {
		if _, err := ReadJSONL(bytes.NewReader(jl), "a.jsonl"); err != nil {
			t.Fatal(err)
		}
	})
	if perMsg := allocs / rows; perMsg > 0.05 {
		t.Errorf("ReadJSONL: %.3f allocations per message, want at most 0.05", perMsg)
	}
}
