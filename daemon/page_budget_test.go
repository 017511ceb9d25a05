package daemon

import (
	"fmt"
	"testing"
	"unsafe"

	"surmise/config"
)

// TestPageBudget checks that the history rings of a fleet stay within the
// page's memory budget, and that a lone estimator keeps its whole history.
func TestPageBudget(t *testing.T) {
	base, err := config.LoadPlant("../testdata/plants/hotwater-loop.yaml")
	if err != nil {
		t.Fatal(err)
	}
	ringBytes := func(pe *pageEst) int64 {
		return int64(len(pe.ring.vals))*8 + int64(len(pe.ring.rows))*int64(unsafe.Sizeof(pageRow{}))
	}
	for _, count := range []int{1, 1000, 5000} {
		ests := make([]PageEstimator, count)
		for i := range ests {
			pl := *base
			pl.Name = fmt.Sprintf("loop-%d", i)
			ests[i] = PageEstimator{Plant: &pl}
		}
		// A 10 ms tick, so five minutes is 30,000 ticks: more than any ring.
		for i := range ests {
			m := *ests[i].Plant.Model
			m.Ts = 0.01
			ests[i].Plant.Model = &m
		}
		p, err := NewPage(ests, PageOptions{})
		if err != nil {
			t.Fatal(err)
		}
		var total int64
		for _, pe := range p.ests {
			total += ringBytes(pe)
		}
		rows := len(p.ests[0].ring.rows)
		t.Logf("%d estimators: %d rows each (one tick in %d), %.1f MiB in all", count, rows, p.ests[0].every, float64(total)/(1<<20))
		switch {
		case count == 1 && rows != pageMaxRows:
			t.Errorf("one estimator keeps %d rows, want %d", rows, pageMaxRows)
		case total > pageBudget && rows > pageMinRows:
			t.Errorf("%d estimators hold %d bytes of history, budget %d", count, total, pageBudget)
		case rows < pageMinRows:
			t.Errorf("%d rows each, want at least %d", rows, pageMinRows)
		}
	}
}
