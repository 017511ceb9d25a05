package estimator

// FilterState is a copy of everything a Filter carries from one Step to the
// next: the estimate, the prediction-form correction not yet applied, the
// input held, the covariance and the bookkeeping of the gate and of the
// covariance's acquisition and settling. A caller that keeps the state saved
// before each Step can go back to any of them and step again, with other
// measurements — to fuse a sample that arrived after its tick had run.
//
// Make one with Filter.NewState; SaveTo and RestoreFrom allocate nothing.
// A state restores only into a filter of the same dimensions, running the
// same prepared gain set it was saved with.
type FilterState struct {
	pr                        *Prepared
	x, pend, uPrev, P, pnext  []float64
	hasP, first, acq, settled bool
	hasNext                   bool
	rejected                  int
}

// NewState returns a FilterState sized for f.
func (f *Filter) NewState() *FilterState {
	n := f.n
	return &FilterState{
		x: make([]float64, n), pend: make([]float64, n), uPrev: make([]float64, f.m),
		P: make([]float64, n*n), pnext: make([]float64, n*n),
	}
}

// SaveTo copies the filter's state into s. It panics if s was made for a
// filter of other dimensions.
func (f *Filter) SaveTo(s *FilterState) {
	f.check("SaveTo", len(s.x)+len(s.uPrev), f.n+f.m)
	s.pr = f.pr
	copy(s.x, f.x)
	copy(s.pend, f.pend)
	copy(s.uPrev, f.uPrev)
	// A settled filter's P is exactly its set's steady state (setPub,
	// copied in when it settled and untouched until it leaves), and it has
	// no next P: there is nothing to keep, and the two n×n copies, the
	// bulk of a save, are spared on every steady tick.
	if !f.settled {
		copy(s.P, f.P)
		copy(s.pnext, f.pnext)
	}
	s.hasP, s.first, s.acq, s.settled, s.hasNext = f.hasP, f.first, f.acq, f.settled, f.hasNext
	s.rejected = f.rejected
}

// RestoreFrom puts the filter back in the state saved in s: the next Step
// continues from there. It panics if s was saved from a filter of other
// dimensions or with another prepared gain set.
func (f *Filter) RestoreFrom(s *FilterState) {
	f.check("RestoreFrom", len(s.x)+len(s.uPrev), f.n+f.m)
	if s.pr != f.pr {
		panic("estimator: Filter.RestoreFrom: the state was saved with another gain set")
	}
	copy(f.x, s.x)
	copy(f.pend, s.pend)
	copy(f.uPrev, s.uPrev)
	if s.settled {
		copy(f.P, f.pr.setPub)
	} else {
		copy(f.P, s.P)
		copy(f.pnext, s.pnext)
	}
	f.hasP, f.first, f.acq, f.settled, f.hasNext = s.hasP, s.first, s.acq, s.settled, s.hasNext
	f.rejected = s.rejected
	f.svOK, f.svGain = false, nil
}
