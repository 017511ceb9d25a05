package report

import (
	"fmt"
	"math"
	"time"
)

// Input is everything a replay report shows: one Run per gain set, all
// over the same recording.
type Input struct {
	Plant  string // the plant's name
	Source string // the recording, as the user named it

	StateNames, StateUnits   []string // units may be nil
	OutputNames, OutputUnits []string // units may be nil

	Runs []Run

	// Truth, when not nil, holds the true states of a simulated recording,
	// column-wise like Ticks: Truth[i][k] is state i at tick k. Every run
	// must then have the same number of ticks as each Truth column.
	Truth [][]float64
}

// Run is one gain set's pass over the recording.
type Run struct {
	Gains       string // the gain set's name
	Form        string // e.g. "prediction", "current", "kalman"
	Fingerprint string // of the model the gains were designed for
	Ticks       Ticks
}

// Ticks holds a run's per-tick results column by column: a replay of a day
// at 10 Hz is 864,000 ticks, and a column of float64 per quantity costs no
// allocation per tick and is what the plots and statistics read. Build it
// with NewTicks and Append, or fill the columns directly.
//
// Optional columns may be nil: StateStd, InnovationStd, NISMean, BandLo,
// BandHi, Faults. Within a column, NaN means "not available at this tick".
type Ticks struct {
	Time   []time.Time
	Status []string // the tick's status word: tracking, coasting, stale-input, suspect

	States   [][]float64 // States[i][k]: estimate of state i at tick k, absolute value
	StateStd [][]float64 // its standard deviation

	Innovations   [][]float64 // Innovations[j][k]: output j at tick k; NaN when absent
	InnovationStd [][]float64 // √S_jj, the innovation's standard deviation claimed by the filter

	NIS []float64 // NaN when no output was used
	Dof []int     // the number of outputs in the NIS, 0 when none

	NISMean        []float64 // windowed mean NIS, as the engine kept it
	BandLo, BandHi []float64 // its 95 % band

	Outliers []int // samples rejected by the gate at this tick

	// Faults[j][k] holds the fault indicators of output j at tick k, as
	// FaultBiasHigh | FaultBiasLow | FaultStuck | FaultLockedOut bits.
	Faults [][]uint8
}

// Fault bits of Ticks.Faults: the sensor watch's indicators of one output
// at one tick.
const (
	FaultBiasHigh  uint8 = 1 << iota // the CUSUM says the sensor reads high
	FaultBiasLow                     // … reads low
	FaultStuck                       // repeated values, or innovations far below their claim
	FaultLockedOut                   // the gate refused the last samples in a row
)

// TickRow is one tick, as the replay driver produces it. Its slices are
// read by Ticks.Append and may be reused for the next tick.
type TickRow struct {
	Time   time.Time
	Status string

	States, StateStd           []float64
	Innovations, InnovationStd []float64 // NaN when absent

	NIS                     float64
	Dof                     int
	NISMean, BandLo, BandHi float64
	Outliers                int
	Faults                  []uint8 // per output; nil appends zeros
}

// NewTicks returns empty Ticks for n states and p outputs, with room for
// capacity ticks, all optional columns present.
func NewTicks(n, p, capacity int) Ticks {
	cols := func(k int) [][]float64 {
		c := make([][]float64, k)
		for i := range c {
			c[i] = make([]float64, 0, capacity)
		}
		return c
	}
	return Ticks{
		Time:          make([]time.Time, 0, capacity),
		Status:        make([]string, 0, capacity),
		States:        cols(n),
		StateStd:      cols(n),
		Innovations:   cols(p),
		InnovationStd: cols(p),
		NIS:           make([]float64, 0, capacity),
		Dof:           make([]int, 0, capacity),
		NISMean:       make([]float64, 0, capacity),
		BandLo:        make([]float64, 0, capacity),
		BandHi:        make([]float64, 0, capacity),
		Outliers:      make([]int, 0, capacity),
		Faults:        faultCols(p, capacity),
	}
}

func faultCols(p, capacity int) [][]uint8 {
	c := make([][]uint8, p)
	for i := range c {
		c[i] = make([]uint8, 0, capacity)
	}
	return c
}

// Len returns the number of ticks.
func (t *Ticks) Len() int { return len(t.Time) }

// Append adds one tick, copying the row's values. It allocates only when a
// column outgrows its capacity. It panics if the row's slices do not match
// the number of states and outputs of t (a programmer's mistake). A nil
// StateStd or InnovationStd in the row appends NaNs.
func (t *Ticks) Append(r *TickRow) {
	if len(r.States) != len(t.States) || len(r.Innovations) != len(t.Innovations) ||
		(r.StateStd != nil && len(r.StateStd) != len(t.States)) ||
		(r.InnovationStd != nil && len(r.InnovationStd) != len(t.Innovations)) {
		panic(fmt.Sprintf("report: a tick of %d states and %d outputs appended to ticks of %d and %d",
			len(r.States), len(r.Innovations), len(t.States), len(t.Innovations)))
	}
	t.Time = append(t.Time, r.Time)
	t.Status = append(t.Status, r.Status)
	for i, v := range r.States {
		t.States[i] = append(t.States[i], v)
	}
	for i := range t.StateStd {
		v := math.NaN()
		if r.StateStd != nil {
			v = r.StateStd[i]
		}
		t.StateStd[i] = append(t.StateStd[i], v)
	}
	for j, v := range r.Innovations {
		t.Innovations[j] = append(t.Innovations[j], v)
	}
	for j := range t.InnovationStd {
		v := math.NaN()
		if r.InnovationStd != nil {
			v = r.InnovationStd[j]
		}
		t.InnovationStd[j] = append(t.InnovationStd[j], v)
	}
	t.NIS = append(t.NIS, r.NIS)
	t.Dof = append(t.Dof, r.Dof)
	t.NISMean = append(t.NISMean, r.NISMean)
	t.BandLo = append(t.BandLo, r.BandLo)
	t.BandHi = append(t.BandHi, r.BandHi)
	t.Outliers = append(t.Outliers, r.Outliers)
	for j := range t.Faults {
		var f uint8
		if r.Faults != nil {
			f = r.Faults[j]
		}
		t.Faults[j] = append(t.Faults[j], f)
	}
}

// Validate checks that every column has the right length and that the
// runs agree with the names and with Truth. Summarise and WriteHTML need
// a valid Input.
func (in *Input) Validate() error {
	n, p := len(in.StateNames), len(in.OutputNames)
	if in.StateUnits != nil && len(in.StateUnits) != n {
		return fmt.Errorf("report: %d state units for %d states", len(in.StateUnits), n)
	}
	if in.OutputUnits != nil && len(in.OutputUnits) != p {
		return fmt.Errorf("report: %d output units for %d outputs", len(in.OutputUnits), p)
	}
	if len(in.Runs) == 0 {
		return fmt.Errorf("report: no runs")
	}
	for ri := range in.Runs {
		r := &in.Runs[ri]
		t := &r.Ticks
		k := t.Len()
		bad := func(what string, got int) error {
			return fmt.Errorf("report: run %q: %s has %d entries, want %d", r.Gains, what, got, k)
		}
		if k == 0 {
			return fmt.Errorf("report: run %q has no ticks", r.Gains)
		}
		for i := 1; i < k; i++ {
			if t.Time[i].Before(t.Time[i-1]) {
				return fmt.Errorf("report: run %q: tick %d is earlier than tick %d", r.Gains, i, i-1)
			}
		}
		for _, c := range []struct {
			what     string
			got      int
			optional bool
		}{
			{"Status", len(t.Status), false}, {"NIS", len(t.NIS), false}, {"Dof", len(t.Dof), false},
			{"Outliers", len(t.Outliers), false}, {"NISMean", len(t.NISMean), true},
			{"BandLo", len(t.BandLo), true}, {"BandHi", len(t.BandHi), true},
		} {
			if c.got != k && !(c.optional && c.got == 0) {
				return bad(c.what, c.got)
			}
		}
		if len(t.NISMean) != len(t.BandLo) || len(t.NISMean) != len(t.BandHi) {
			return fmt.Errorf("report: run %q: NISMean, BandLo and BandHi must be given together", r.Gains)
		}
		for _, m := range []struct {
			what     string
			cols     [][]float64
			want     int
			optional bool
		}{
			{"States", t.States, n, false}, {"StateStd", t.StateStd, n, true},
			{"Innovations", t.Innovations, p, false}, {"InnovationStd", t.InnovationStd, p, true},
		} {
			if m.optional && m.cols == nil {
				continue
			}
			if len(m.cols) != m.want {
				return fmt.Errorf("report: run %q: %s has %d columns, want %d", r.Gains, m.what, len(m.cols), m.want)
			}
			for i, c := range m.cols {
				if len(c) != k {
					return bad(fmt.Sprintf("%s[%d]", m.what, i), len(c))
				}
			}
		}
		if t.Faults != nil {
			if len(t.Faults) != p {
				return fmt.Errorf("report: run %q: Faults has %d columns, want %d", r.Gains, len(t.Faults), p)
			}
			for j, c := range t.Faults {
				if len(c) != k {
					return bad(fmt.Sprintf("Faults[%d]", j), len(c))
				}
			}
		}
		if in.Truth != nil {
			if len(in.Truth) != n {
				return fmt.Errorf("report: Truth has %d columns, want %d", len(in.Truth), n)
			}
			for i, c := range in.Truth {
				if len(c) != k {
					return bad(fmt.Sprintf("Truth[%d]", i), len(c))
				}
			}
		}
	}
	return nil
}
