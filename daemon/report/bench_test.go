package report

import (
	"io"
	"testing"
)

// countingWriter counts what the report writes.
type countingWriter struct{ n int64 }

func (c *countingWriter) Write(p []byte) (int, error) { c.n += int64(len(p)); return len(p), nil }

// BenchmarkWriteHTML renders the report of a day at 10 Hz (864,000 ticks)
// for two gain sets, and reports the page's size.
func BenchmarkWriteHTML(b *testing.B) {
	in := simulate(864_000, 1)
	b.ReportAllocs()
	var size int64
	for b.Loop() {
		w := &countingWriter{}
		if err := WriteHTML(w, in); err != nil {
			b.Fatal(err)
		}
		size = w.n
	}
	b.ReportMetric(float64(size), "page-bytes")
}

// BenchmarkSummarise computes the statistics of the same day.
func BenchmarkSummarise(b *testing.B) {
	in := simulate(864_000, 1)
	b.ReportAllocs()
	for b.Loop() {
		if s := Summarise(in); len(s) != 2 {
			b.Fatal(len(s))
		}
	}
}

var _ io.Writer = (*countingWriter)(nil)
