package estimator

import (
	"fmt"
	"math/rand/v2"
	"runtime"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// benchModel returns a seeded random model with n states, m inputs and p
// outputs: A is 0.9 times a random orthogonal matrix (every eigenvalue of
// magnitude 0.9, so a small gain keeps the error dynamics stable), the other
// matrices are standard normal, Q = 0.01·I, R = 0.1·I. Its fixed gains
// are small random matrices, with S = I.
func benchModel(n, m, p int) (*Model, []*GainSet) {
	rng := rand.New(rand.NewPCG(uint64(n), uint64(1000*m+p)))
	rnd := func(r, c int, s float64) *mat.Dense {
		d := mat.NewDense(r, c, nil)
		for i := 0; i < r; i++ {
			for j := 0; j < c; j++ {
				d.Set(i, j, s*rng.NormFloat64())
			}
		}
		return d
	}
	var qr mat.QR
	qr.Factorize(rnd(n, n, 1))
	var a mat.Dense
	qr.QTo(&a)
	a.Scale(0.9, &a)
	q := mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		q.SetSym(i, i, 0.01)
	}
	r := mat.NewSymDense(p, nil)
	s := mat.NewSymDense(p, nil)
	for i := 0; i < p; i++ {
		r.SetSym(i, i, 0.1)
		s.SetSym(i, i, 1)
	}
	md := &Model{A: &a, B: rnd(n, m, 1), C: rnd(p, n, 1), D: rnd(p, m, 0.1), Ts: 1, Q: q, R: r}
	l := rnd(n, p, 0.002)
	return md, []*GainSet{
		{Name: "prediction", Form: Prediction, Gains: []PatternGain{{Outputs: FullPattern(p), L: l, S: s, P: q}}},
		{Name: "current", Form: Current, Gains: []PatternGain{{Outputs: FullPattern(p), L: l, S: s, P: q}}},
		{Name: "kalman", Form: Kalman},
	}
}

// BenchmarkStep times one tick (predict, innovation, correct, NIS) with every output present, on the measurements of a simulated plant.
// The C loop in testdata/reference/stepfloor.c does the same arithmetic.
// Besides the wall time per tick it reports the CPU time of the thread per
// tick (cpu-ns/op, Linux), which a busy machine disturbs less.
func BenchmarkStep(b *testing.B) {
	sizes := []struct{ n, m, p int }{{4, 1, 2}, {20, 3, 5}, {100, 5, 10}, {20, 5, 3}}
	for _, sz := range sizes {
		md, sets := benchModel(sz.n, sz.m, sz.p)
		for _, g := range sets {
			if sz == (struct{ n, m, p int }{20, 5, 3}) && g.Form != Kalman {
				continue
			}
			name := fmt.Sprintf("%s/n=%d,m=%d,p=%d", g.Name, sz.n, sz.m, sz.p)
			b.Run(name, func(b *testing.B) {
				// The gate is off: the 64-tick replay jumps where it wraps,
				// and the gate would turn those ticks into predict-only ones.
				// With it on, a tick that passes costs one comparison more.
				pr, err := Prepare(md, g, 0)
				if err != nil {
					b.Fatal(err)
				}
				// 64 ticks of a simulated plant, replayed in a loop.
				const ticks = 64
				pl := NewPlant(md, 1, nil)
				us := make([][]float64, ticks)
				ys := make([][]float64, ticks)
				for k := range us {
					us[k] = make([]float64, sz.m)
					us[k][0] = float64(k%8) - 4
					ys[k] = make([]float64, sz.p)
					pl.Step(us[k])
					pl.OutputTo(ys[k])
				}
				f := NewFilter(pr, nil, nil)
				full := FullPattern(sz.p)
				corrected := 0
				runtime.LockOSThread()
				defer runtime.UnlockOSThread()
				b.ReportAllocs()
				b.ResetTimer()
				cpu0, cpuOK := threadCPU()
				for i := 0; i < b.N; i++ {
					if f.Step(us[i%ticks], ys[i%ticks], full).Corrected {
						corrected++
					}
				}
				cpu1, _ := threadCPU()
				b.StopTimer()
				if cpuOK {
					b.ReportMetric(float64(cpu1-cpu0)/float64(b.N), "cpu-ns/op")
				}
				if corrected != b.N {
					b.Fatalf("only %d of %d ticks corrected: the benchmark would time the wrong path", corrected, b.N)
				}
			})
		}
	}
}
