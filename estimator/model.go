package estimator

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Signal names one state, input or output and gives its engineering unit.
type Signal struct {
	Name string
	Unit string
}

// Model is a discrete-time linear model in deviation variables around an
// operating point:
//
//	x(k+1) = A·x(k) + B·u(k) + w(k),   w ~ N(0, Q)
//	y(k)   = C·x(k) + D·u(k) + v(k),   v ~ N(0, R)
//
// where x, u and y are deviations from X0, U0 and Y0. A model is a value:
// nothing in this package changes a Model after it is built, and callers must
// not either.
type Model struct {
	A, B, C, D *mat.Dense // n×n, n×m, p×n, p×m
	Ts         float64    // sample time in seconds, > 0

	X0, U0, Y0 []float64 // operating point, lengths n, m, p (nil means zero)

	States, Inputs, Outputs []Signal // lengths n, m, p

	Q *mat.SymDense // process noise covariance of the discrete model, n×n; nil if unknown
	R *mat.SymDense // measurement noise covariance, p×p; nil if unknown
}

// Dims returns the number of states n, inputs m and outputs p.
func (md *Model) Dims() (n, m, p int) {
	n, m = md.B.Dims()
	p, _ = md.C.Dims()
	return n, m, p
}

// Validate checks that the dimensions agree and that every number is finite.
// It is the check a constructor runs on a model built by hand; models built by
// the config package have already passed it.
func (md *Model) Validate() error {
	if md.A == nil || md.B == nil || md.C == nil || md.D == nil {
		return fmt.Errorf("model: A, B, C and D are all required")
	}
	n, nc := md.A.Dims()
	if n != nc || n == 0 {
		return fmt.Errorf("model: A is %d×%d, want a non-empty square matrix", n, nc)
	}
	bn, m := md.B.Dims()
	if bn != n {
		return fmt.Errorf("model: B has %d rows, want %d (the rows of A)", bn, n)
	}
	p, cn := md.C.Dims()
	if cn != n || p == 0 {
		return fmt.Errorf("model: C is %d×%d, want p×%d with p ≥ 1", p, cn, n)
	}
	dp, dm := md.D.Dims()
	if dp != p || dm != m {
		return fmt.Errorf("model: D is %d×%d, want %d×%d", dp, dm, p, m)
	}
	if !(md.Ts > 0) || math.IsInf(md.Ts, 0) {
		return fmt.Errorf("model: sample time %v s, want a finite positive number", md.Ts)
	}
	if p > MaxOutputs {
		return fmt.Errorf("model: %d outputs, at most %d are supported", p, MaxOutputs)
	}
	for _, c := range []struct {
		name string
		m    mat.Matrix
	}{{"A", md.A}, {"B", md.B}, {"C", md.C}, {"D", md.D}} {
		if err := finite(c.name, c.m); err != nil {
			return err
		}
	}
	for _, v := range []struct {
		name string
		v    []float64
		want int
	}{{"X0", md.X0, n}, {"U0", md.U0, m}, {"Y0", md.Y0, p}} {
		if v.v != nil && len(v.v) != v.want {
			return fmt.Errorf("model: %s has %d entries, want %d", v.name, len(v.v), v.want)
		}
		for i, x := range v.v {
			if math.IsNaN(x) || math.IsInf(x, 0) {
				return fmt.Errorf("model: %s[%d] is %v, want a finite number", v.name, i, x)
			}
		}
	}
	for _, s := range []struct {
		name string
		s    []Signal
		want int
	}{{"States", md.States, n}, {"Inputs", md.Inputs, m}, {"Outputs", md.Outputs, p}} {
		if s.s != nil && len(s.s) != s.want {
			return fmt.Errorf("model: %s has %d names, want %d", s.name, len(s.s), s.want)
		}
	}
	if md.Q != nil {
		if r := md.Q.SymmetricDim(); r != n {
			return fmt.Errorf("model: Q is %d×%d, want %d×%d", r, r, n, n)
		}
		if err := finite("Q", md.Q); err != nil {
			return err
		}
	}
	if md.R != nil {
		if r := md.R.SymmetricDim(); r != p {
			return fmt.Errorf("model: R is %d×%d, want %d×%d", r, r, p, p)
		}
		if err := finite("R", md.R); err != nil {
			return err
		}
	}
	return nil
}

// MaxOutputs is the largest number of outputs a model may have: a pattern of
// present outputs is held in one uint64.
const MaxOutputs = 64

func finite(name string, m mat.Matrix) error {
	r, c := m.Dims()
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			if v := m.At(i, j); math.IsNaN(v) || math.IsInf(v, 0) {
				return fmt.Errorf("model: %s[%d,%d] is %v, want a finite number", name, i, j, v)
			}
		}
	}
	return nil
}
