package report

import (
	"math"
	"testing"
)

func series(n int, f func(i int) float64) (x, y []float64) {
	x, y = make([]float64, n), make([]float64, n)
	for i := range x {
		x[i] = float64(i) * 0.1
		y[i] = f(i)
	}
	return x, y
}

func TestDecimatorKeepsSpikes(t *testing.T) {
	const n = 864_000
	x, y := series(n, func(i int) float64 { return math.Sin(float64(i) * 1e-4) })
	y[123_457] = 50  // a one-tick spike up
	y[654_321] = -40 // and down
	d := newDecimator(x, Buckets)
	segs := d.lines(x, y)
	if len(segs) != 1 {
		t.Fatalf("%d segments, want 1", len(segs))
	}
	pts := segs[0]
	if len(pts) > 2*Buckets {
		t.Errorf("%d points for %d buckets, want at most two per bucket", len(pts), Buckets)
	}
	var hi, lo float64
	for i, p := range pts {
		hi, lo = math.Max(hi, p.Y), math.Min(lo, p.Y)
		if i > 0 && p.X < pts[i-1].X {
			t.Fatalf("points not in time order at %d", i)
		}
	}
	if hi != 50 || lo != -40 {
		t.Errorf("extremes %g and %g survive, want 50 and −40", hi, lo)
	}
	up := d.upper(x, y)
	if len(up) != 1 || len(up[0]) > Buckets {
		t.Fatalf("upper envelope: %d segments, %d points", len(up), len(up[0]))
	}
	hi = math.Inf(-1)
	for _, p := range up[0] {
		hi = math.Max(hi, p.Y)
	}
	if hi != 50 {
		t.Errorf("the upper envelope lost the spike: max %g", hi)
	}
}

func TestDecimatorGapsAndSparseSeries(t *testing.T) {
	const n = 100_000
	x, y := series(n, func(i int) float64 {
		switch {
		case i >= 40_000 && i < 45_000:
			return math.NaN() // an outage of 5 % of the run
		case i%5 != 0:
			return math.NaN() // a sensor at a fifth of the tick rate
		}
		return 1
	})
	d := newDecimator(x, Buckets)
	if got := len(d.lines(x, y)); got != 2 {
		t.Errorf("%d segments, want 2: the outage splits the line, the slow sensor does not", got)
	}
	// Few points: drawn as they are, and a slow sensor still one line.
	xs, ys := series(200, func(i int) float64 {
		if i%3 != 0 {
			return math.NaN()
		}
		return float64(i)
	})
	segs := newDecimator(xs, Buckets).lines(xs, ys)
	if len(segs) != 1 || len(segs[0]) != 67 {
		t.Errorf("sparse short series: %d segments, want 1 of 67 points", len(segs))
	}
}

func TestDecimatorBandEnvelope(t *testing.T) {
	const n = 50_000
	x, c := series(n, func(i int) float64 { return float64(i % 7) })
	_, s := series(n, func(i int) float64 { return 0.5 })
	s[30_000] = 10 // one wide tick
	polys := newDecimator(x, Buckets).band(x, c, s, 2)
	if len(polys) != 1 {
		t.Fatalf("%d polygons, want 1", len(polys))
	}
	hi, lo := math.Inf(-1), math.Inf(1)
	for _, p := range polys[0] {
		hi, lo = math.Max(hi, p.Y), math.Min(lo, p.Y)
	}
	// The envelope reaches both edges of the widest tick: 30000 % 7 = 5,
	// so 5 ± 2·10.
	if hi != 25 || lo != -15 {
		t.Errorf("band from %g to %g, want −15 to 25", lo, hi)
	}
	if e := edges(polys); len(e) != 2 || len(e[0]) != len(e[1]) {
		t.Errorf("edges: %d lines", len(e))
	}
}
