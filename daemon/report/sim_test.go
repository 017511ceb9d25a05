package report

import (
	"math"
	"math/rand/v2"
	"time"

	"gonum.org/v1/gonum/stat/distuv"
)

// simulate makes a replay Input the way the replay driver would: a seeded
// two-state plant (a slowly wandering tank temperature and a drifting
// offset of a second, slower sensor) measured by a fast probe and a slow
// analyser, and two time-varying Kalman filters over the same measurements:
// "tuned" with the plant's own noise levels and "sluggish" with a process
// noise twenty times too small, which makes it overconfident. The probe has
// an outage from 40 % to 45 % of the run and a rare +3 °C spike.
//
// It is test data, not a reference: the tests that check numbers use the
// fixtures of testdata/reference.py or closed forms.
func simulate(ticks int, seed uint64) *Input {
	const ts = 100 * time.Millisecond
	t0 := time.Date(2024, 5, 6, 6, 0, 0, 0, time.UTC)
	rng := rand.New(rand.NewPCG(seed, 1))
	q := [2]float64{1e-3, 1e-6} // process noise variances per tick
	r := [2]float64{0.04, 0.01} // measurement noise variances
	in := &Input{
		Plant:       "hot-water loop",
		Source:      "simulated.csv",
		StateNames:  []string{"T_tank", "offset"},
		StateUnits:  []string{"°C", "K"},
		OutputNames: []string{"T_probe", "T_analyser"},
		OutputUnits: []string{"°C", "°C"},
		Truth:       [][]float64{make([]float64, ticks), make([]float64, ticks)},
	}
	type meas struct {
		y       [2]float64
		present [2]bool
	}
	ms := make([]meas, ticks)
	x := [2]float64{61, 0.3}
	for k := 0; k < ticks; k++ {
		x[0] += math.Sqrt(q[0]) * rng.NormFloat64()
		x[1] += math.Sqrt(q[1]) * rng.NormFloat64()
		in.Truth[0][k], in.Truth[1][k] = x[0], x[1]
		frac := float64(k) / float64(ticks)
		m := &ms[k]
		if frac < 0.40 || frac >= 0.45 {
			m.present[0] = true
			m.y[0] = x[0] + math.Sqrt(r[0])*rng.NormFloat64()
			if rng.Float64() < 5e-4 {
				m.y[0] += 3
			}
		}
		if k%5 == 0 {
			m.present[1] = true
			m.y[1] = x[0] + x[1] + math.Sqrt(r[1])*rng.NormFloat64()
		}
	}
	for _, run := range []struct {
		name  string
		scale float64
	}{{"tuned", 1}, {"sluggish", 0.05}} {
		f := newKalman2([2]float64{q[0] * run.scale, q[1] * run.scale}, r)
		tk := NewTicks(2, 2, ticks)
		var row TickRow
		row.States, row.StateStd = make([]float64, 2), make([]float64, 2)
		row.Innovations, row.InnovationStd = make([]float64, 2), make([]float64, 2)
		for k := 0; k < ticks; k++ {
			f.step(ms[k].y, ms[k].present, &row)
			row.Time = t0.Add(time.Duration(k) * ts)
			tk.Append(&row)
		}
		in.Runs = append(in.Runs, Run{Gains: run.name, Form: "kalman",
			Fingerprint: "sha256:4f9c2a1be07d53c8e61a", Ticks: tk})
	}
	return in
}

// kalman2 is a time-varying Kalman filter for x(k+1) = x(k) + w,
// y1 = x1 + v1, y2 = x1 + x2 + v2, written out for two states so that a
// day of ticks simulates in well under a second.
type kalman2 struct {
	x      [2]float64
	p      [2][2]float64
	q, r   [2]float64
	window [100]struct {
		nis float64
		dof int
	}
	head, count, sumDof int
	sumNIS              float64
	bandLo, bandHi      map[int]float64
	gate                [3]float64 // by dof: the 0.9999 quantile of χ²(dof)
}

func newKalman2(q, r [2]float64) *kalman2 {
	f := &kalman2{x: [2]float64{60, 0}, p: [2][2]float64{{4, 0}, {0, 1}}, q: q, r: r,
		bandLo: map[int]float64{}, bandHi: map[int]float64{}}
	for m := 1; m <= 2; m++ {
		f.gate[m] = distuv.ChiSquared{K: float64(m)}.Quantile(0.9999)
	}
	return f
}

func (f *kalman2) step(y [2]float64, present [2]bool, row *TickRow) {
	h2 := [2][2]float64{{1, 0}, {1, 1}} // the output matrix
	f.p[0][0] += f.q[0]
	f.p[1][1] += f.q[1]
	var idx []int
	for a := 0; a < 2; a++ {
		row.Innovations[a], row.InnovationStd[a] = math.NaN(), math.NaN()
		if present[a] {
			idx = append(idx, a)
		}
	}
	m := len(idx)
	row.NIS, row.Dof, row.Outliers, row.Status = math.NaN(), 0, 0, "coasting"
	if m > 0 {
		var pht [2][2]float64 // P·Hᵀ, 2×m
		var s [2][2]float64
		var res [2]float64
		for b, ob := range idx {
			for i := 0; i < 2; i++ {
				pht[i][b] = f.p[i][0]*h2[ob][0] + f.p[i][1]*h2[ob][1]
			}
			res[b] = y[ob] - (h2[ob][0]*f.x[0] + h2[ob][1]*f.x[1])
		}
		for a, oa := range idx {
			for b := range idx {
				s[a][b] = h2[oa][0]*pht[0][b] + h2[oa][1]*pht[1][b]
			}
			s[a][a] += f.r[oa]
		}
		var si [2][2]float64
		if m == 1 {
			si[0][0] = 1 / s[0][0]
		} else {
			det := s[0][0]*s[1][1] - s[0][1]*s[1][0]
			si = [2][2]float64{{s[1][1] / det, -s[0][1] / det}, {-s[1][0] / det, s[0][0] / det}}
		}
		nis := 0.0
		for a := 0; a < m; a++ {
			for b := 0; b < m; b++ {
				nis += res[a] * si[a][b] * res[b]
			}
		}
		for a, oa := range idx {
			row.Innovations[oa] = res[a]
			row.InnovationStd[oa] = math.Sqrt(s[a][a])
		}
		row.NIS, row.Dof = nis, m
		if nis > f.gate[m] {
			row.Outliers = m
		} else {
			var k [2][2]float64 // K = P·Hᵀ·S⁻¹, 2×m
			for i := 0; i < 2; i++ {
				for b := 0; b < m; b++ {
					for c := 0; c < m; c++ {
						k[i][b] += pht[i][c] * si[c][b]
					}
				}
			}
			for i := 0; i < 2; i++ {
				for b := 0; b < m; b++ {
					f.x[i] += k[i][b] * res[b]
				}
			}
			var kh [2][2]float64 // K·H
			for i := 0; i < 2; i++ {
				for j := 0; j < 2; j++ {
					for b, ob := range idx {
						kh[i][j] += k[i][b] * h2[ob][j]
					}
				}
			}
			var np [2][2]float64
			for i := 0; i < 2; i++ {
				for j := 0; j < 2; j++ {
					np[i][j] = f.p[i][j] - (kh[i][0]*f.p[0][j] + kh[i][1]*f.p[1][j])
				}
			}
			np[0][1] = (np[0][1] + np[1][0]) / 2
			np[1][0] = np[0][1]
			f.p = np
			row.Status = "tracking"
			f.add(nis, m)
		}
	}
	row.NISMean, row.BandLo, row.BandHi = math.NaN(), math.NaN(), math.NaN()
	if f.count == len(f.window) {
		row.NISMean = f.sumNIS / float64(f.count)
		lo, ok := f.bandLo[f.sumDof]
		if !ok {
			d := distuv.ChiSquared{K: float64(f.sumDof)}
			lo = d.Quantile(0.025) / float64(f.count)
			f.bandLo[f.sumDof], f.bandHi[f.sumDof] = lo, d.Quantile(0.975)/float64(f.count)
		}
		row.BandLo, row.BandHi = lo, f.bandHi[f.sumDof]
		if row.Status == "tracking" && (row.NISMean < row.BandLo || row.NISMean > row.BandHi) {
			row.Status = "suspect"
		}
	}
	for i := 0; i < 2; i++ {
		row.States[i] = f.x[i]
		row.StateStd[i] = math.Sqrt(f.p[i][i])
	}
}

func (f *kalman2) add(nis float64, dof int) {
	if f.count == len(f.window) {
		old := f.window[f.head]
		f.sumNIS -= old.nis
		f.sumDof -= old.dof
	} else {
		f.count++
	}
	f.window[f.head].nis, f.window[f.head].dof = nis, dof
	f.sumNIS += nis
	f.sumDof += dof
	f.head = (f.head + 1) % len(f.window)
}
