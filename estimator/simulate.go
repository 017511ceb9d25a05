package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"
)

// Plant is a seeded simulation of a Model, with process noise w ~ N(0, Q)
// and measurement noise v ~ N(0, R) (no noise where the model's Q or R is
// nil). It produces exactly the sequence a Filter expects (Filter.Step):
//
//	for k := 0; ; k++ {
//		u := …                 // the input decided at sample k
//		plant.Step(u)          // the plant is now at sample k, holding u
//		plant.OutputTo(y)      // y(k) = Y0 + C·x(k) + D·(u(k) − U0) + v(k)
//		filter.Step(u, y, all) // estimates x(k) (x(k|k−1) in the prediction form)
//		plant.StateTo(x)       // the true x(k), to compare with the estimate
//	}
//
// Step first moves the state from sample k−1 to k with the input held since
// the previous Step, x(k) = A·x(k−1) + B·(u(k−1) − U0) + w(k−1) (the first
// Step does not move it: the plant starts at x0), then holds its argument as
// u(k) and draws the measurement of sample k. So the input given at sample k
// acts on the state from sample k+1 on, as the zero-order hold of the filter
// assumes.
//
// Step allocates nothing. Draws come from math/rand/v2's PCG seeded with
// the seed given to NewPlant; the same seed gives the same run.
type Plant struct {
	n, m, p    int
	a, b, c, d []float64 // row-major
	x0, u0, y0 []float64 // operating point (zeros when the model has none)

	fq, fr []float64 // noise factors, F·Fᵀ = Q (n×n), R (p×p); nil without noise

	x, xn   []float64 // deviation state, and scratch
	u, y    []float64 // absolute input held, absolute measurement
	z       []float64 // standard normal draws, max(n, p)
	started bool

	rng *rand.Rand
}

// NewPlant returns a plant at the absolute state x0 (nil means the operating
// point X0) that draws its noise from a PCG generator seeded with seed.
// The input starts at U0 and OutputTo gives the noise-free output until the
// first Step. It panics if the model is not valid or x0 has the wrong
// length.
//
// The noise factors are symmetric square roots computed from an
// eigendecomposition, so a positive semidefinite Q or R (a noise that drives
// only some states) is accepted; negative eigenvalues beyond rounding panic.
func NewPlant(md *Model, seed uint64, x0 []float64) *Plant {
	if err := md.Validate(); err != nil {
		panic(fmt.Sprintf("estimator: NewPlant: %v", err))
	}
	n, m, p := md.Dims()
	pl := &Plant{
		n: n, m: m, p: p,
		a: denseFlat(md.A), b: denseFlat(md.B), c: denseFlat(md.C), d: denseFlat(md.D),
		x0: pointOrZeros(md.X0, n), u0: pointOrZeros(md.U0, m), y0: pointOrZeros(md.Y0, p),
		x: make([]float64, n), xn: make([]float64, n),
		u: make([]float64, m), y: make([]float64, p),
		z:   make([]float64, max(n, p)),
		rng: rand.New(rand.NewPCG(seed, seed^0x9e3779b97f4a7c15)),
	}
	if md.Q != nil {
		pl.fq = noiseFactor("Q", md.Q)
	}
	if md.R != nil {
		pl.fr = noiseFactor("R", md.R)
	}
	if x0 != nil {
		if len(x0) != n {
			panic(fmt.Sprintf("estimator: NewPlant: x0 has %d entries, want %d", len(x0), n))
		}
		for i := range pl.x {
			pl.x[i] = x0[i] - pl.x0[i]
		}
	}
	copy(pl.u, pl.u0)
	pl.measure(false)
	return pl
}

// noiseFactor returns F (row-major n×n) with F·Fᵀ = s, from s = V·Λ·Vᵀ as
// F = V·√Λ.
func noiseFactor(name string, s *mat.SymDense) []float64 {
	var es mat.EigenSym
	if !es.Factorize(s, true) {
		panic(fmt.Sprintf("estimator: NewPlant: eigendecomposition of %s failed", name))
	}
	vals := es.Values(nil)
	var v mat.Dense
	es.VectorsTo(&v)
	n := len(vals)
	top := 0.0
	for _, l := range vals {
		top = math.Max(top, math.Abs(l))
	}
	f := make([]float64, n*n)
	for j, l := range vals {
		if l < -1e-12*top-1e-300 {
			panic(fmt.Sprintf("estimator: NewPlant: %s has eigenvalue %g, want positive semidefinite", name, l))
		}
		sl := math.Sqrt(math.Max(l, 0))
		for i := 0; i < n; i++ {
			f[i*n+j] = v.At(i, j) * sl
		}
	}
	return f
}

// Step moves the plant to the next sample with the input held since the
// previous Step, then holds u (absolute, length m) and draws the measurement
// of the new sample. See the type's documentation for the exact order.
// It panics if u has the wrong length.
func (pl *Plant) Step(u []float64) {
	if len(u) != pl.m {
		panic(fmt.Sprintf("estimator: Plant.Step: u has %d entries, want %d", len(u), pl.m))
	}
	n, m := pl.n, pl.m
	if pl.started {
		for i := 0; i < n; i++ {
			s := 0.0
			row := pl.a[i*n : i*n+n]
			for j, v := range row {
				s += v * pl.x[j]
			}
			brow := pl.b[i*m : i*m+m]
			for j, v := range brow {
				s += v * (pl.u[j] - pl.u0[j])
			}
			pl.xn[i] = s
		}
		if pl.fq != nil {
			z := pl.z[:n]
			for i := range z {
				z[i] = pl.rng.NormFloat64()
			}
			for i := 0; i < n; i++ {
				row := pl.fq[i*n : i*n+n]
				s := 0.0
				for j, v := range row {
					s += v * z[j]
				}
				pl.xn[i] += s
			}
		}
		pl.x, pl.xn = pl.xn, pl.x
	}
	pl.started = true
	copy(pl.u, u)
	pl.measure(true)
}

// measure sets y from the state and the input held, with noise if asked.
func (pl *Plant) measure(noise bool) {
	n, m, p := pl.n, pl.m, pl.p
	for i := 0; i < p; i++ {
		s := pl.y0[i]
		row := pl.c[i*n : i*n+n]
		for j, v := range row {
			s += v * pl.x[j]
		}
		drow := pl.d[i*m : i*m+m]
		for j, v := range drow {
			s += v * (pl.u[j] - pl.u0[j])
		}
		pl.y[i] = s
	}
	if noise && pl.fr != nil {
		z := pl.z[:p]
		for i := range z {
			z[i] = pl.rng.NormFloat64()
		}
		for i := 0; i < p; i++ {
			row := pl.fr[i*p : i*p+p]
			s := 0.0
			for j, v := range row {
				s += v * z[j]
			}
			pl.y[i] += s
		}
	}
}

// OutputTo writes the measurement of the current sample (absolute, length p)
// to dst: y(k) = Y0 + C·x(k) + D·(u(k) − U0) + v(k), drawn by the last Step.
// It panics if dst has the wrong length.
func (pl *Plant) OutputTo(dst []float64) {
	if len(dst) != pl.p {
		panic(fmt.Sprintf("estimator: Plant.OutputTo: dst has %d entries, want %d", len(dst), pl.p))
	}
	copy(dst, pl.y)
}

// StateTo writes the true state of the current sample (absolute, length n)
// to dst. It panics if dst has the wrong length.
func (pl *Plant) StateTo(dst []float64) {
	if len(dst) != pl.n {
		panic(fmt.Sprintf("estimator: Plant.StateTo: dst has %d entries, want %d", len(dst), pl.n))
	}
	for i, v := range pl.x {
		dst[i] = pl.x0[i] + v
	}
}

// denseFlat copies a matrix into a new row-major slice.
func denseFlat(a mat.Matrix) []float64 {
	r, c := a.Dims()
	out := make([]float64, r*c)
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			out[i*c+j] = a.At(i, j)
		}
	}
	return out
}

// pointOrZeros returns a copy of v, or n zeros when v is nil.
func pointOrZeros(v []float64, n int) []float64 {
	out := make([]float64, n)
	copy(out, v)
	return out
}
