package daemon

import (
	"fmt"
	"math"
	"time"

	"gonum.org/v1/gonum/mat"
)

// Checkpoint is an estimator's filter as its owner last saved it: enough
// for a new owner to carry on from the estimate instead of from the plant's
// nominal state. It is stored as JSON in the fleet's state bucket.
type Checkpoint struct {
	Estimator   string    `json:"estimator"`
	Instance    string    `json:"instance"` // the daemon that saved it
	Time        time.Time `json:"time"`     // the tick it was taken at
	Seq         uint64    `json:"seq"`
	Status      string    `json:"status"`
	Gains       string    `json:"gains"`       // the active gain set
	Fingerprint string    `json:"fingerprint"` // of the model it ran
	// State is the absolute state (x₀ + x̂); Covariance its covariance,
	// omitted when the gain set gives none.
	State      []float64   `json:"state"`
	Covariance [][]float64 `json:"covariance,omitempty"`
}

// checkpoint returns the state of the engine's active lane after its
// latest tick. Tick goroutine only (it reads the lane).
func (e *Engine) checkpoint(est *Estimate) *Checkpoint {
	l := e.active
	c := &Checkpoint{
		Estimator:   e.name,
		Instance:    est.Instance,
		Time:        est.Time,
		Seq:         est.Seq,
		Status:      est.Status.String(),
		Gains:       est.Gains,
		Fingerprint: e.fingerprint,
		State:       append([]float64(nil), l.x...),
	}
	var p mat.SymDense
	if l.f.CovarianceTo(&p) {
		n := p.SymmetricDim()
		c.Covariance = make([][]float64, n)
		for i := range n {
			c.Covariance[i] = make([]float64, n)
			for j := range n {
				c.Covariance[i][j] = p.At(i, j)
			}
		}
	}
	return c
}

// restore has every lane restart at the checkpoint's state and covariance
// from the next tick, when it was taken on the engine's model; otherwise it
// says why it cannot be used, and the engine starts as it would anyway.
func (e *Engine) restore(c *Checkpoint) error {
	if c.Fingerprint != e.fingerprint {
		return fmt.Errorf("checkpoint of model %s, the plant's model is %s", c.Fingerprint, e.fingerprint)
	}
	if len(c.State) != e.n {
		return fmt.Errorf("checkpoint has %d states, the model %d", len(c.State), e.n)
	}
	for i, v := range c.State {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("checkpoint state %d is %v", i, v)
		}
	}
	op := laneOp{kind: opReset, x: append([]float64(nil), c.State...)}
	if c.Covariance != nil {
		p, why := covarianceOf(c.Covariance, e.n)
		if p == nil {
			return fmt.Errorf("checkpoint covariance: %s", why)
		}
		op.p0 = p
	}
	e.enqueue(op)
	return nil
}
