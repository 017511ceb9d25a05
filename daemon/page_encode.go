package daemon

import (
	"strconv"

	"surmise/estimator"
)

// pageStream is one reader of an estimator's ring: its copy buffers and its
// output buffer.
type pageStream struct {
	rows []pageRow
	vals []float64
	buf  []byte
}

func (st *pageStream) init(pe *pageEst) {
	st.rows = make([]pageRow, pageChunk)
	st.vals = make([]float64, pageChunk*pe.ring.stride)
}

// next encodes the rows after since, at most the whole ring, as one JSON
// object, and returns it (nil when there are none), the seq of the newest
// row in it and whether rows after since were lost.
func (st *pageStream) next(pe *pageEst, since uint64) (body []byte, last uint64, gap bool) {
	st.buf = st.buf[:0]
	first := true
	for {
		pe.mu.Lock()
		i, lost := pe.ring.after(since)
		k := min(pe.ring.n-i, pageChunk)
		for j := 0; j < k; j++ {
			ph := pe.ring.phys(i + j)
			st.rows[j] = pe.ring.rows[ph]
			copy(st.vals[j*pe.ring.stride:(j+1)*pe.ring.stride], pe.ring.vals[ph*pe.ring.stride:(ph+1)*pe.ring.stride])
		}
		more := pe.ring.n-i > k
		pe.mu.Unlock()
		if first {
			gap = lost
			st.buf = append(st.buf, `{"gap":`...)
			st.buf = strconv.AppendBool(st.buf, gap)
			st.buf = append(st.buf, `,"rows":[`...)
		}
		for j := 0; j < k; j++ {
			if !first || j > 0 {
				st.buf = append(st.buf, ',')
			}
			st.buf = pe.appendRow(st.buf, &st.rows[j], st.vals[j*pe.ring.stride:(j+1)*pe.ring.stride])
		}
		if k > 0 {
			first = false
			since = st.rows[k-1].seq
			last = since
		}
		if !more || k == 0 {
			break
		}
	}
	if last == 0 && !gap {
		return nil, 0, false
	}
	st.buf = append(st.buf, `],"seq":`...)
	st.buf = strconv.AppendUint(st.buf, last, 10)
	st.buf = append(st.buf, '}')
	return st.buf, last, gap
}

// empty returns an update with no rows.
func (st *pageStream) empty(pe *pageEst) []byte {
	pe.mu.Lock()
	last := pe.ring.last()
	pe.mu.Unlock()
	b := append(st.buf[:0], `{"gap":false,"rows":[],"seq":`...)
	b = strconv.AppendUint(b, last, 10)
	return append(b, '}')
}

// appendRow writes one row:
//
//	{"seq", "t" (Unix seconds), "status", "gains", "nis", "dof", "nis_mean",
//	 "nis_band": [lo, hi], "late", "compute" (seconds), "missed", "no_gain",
//	 "out": [[measured, predicted, innovation, innovation_std, age, flags], …],
//	 "x": [[value, std], …], "u": [[value, age, stale], …],
//	 "cand": null or {"gains", "status", "nis", "dof", "nis_mean", "nis_band",
//	          "out": [[predicted, innovation, innovation_std, flags], …],
//	          "x": [[value, std], …]}}
//
// flags: 1 used, 2 rejected by the gate, 4 stale; for the active lane's
// outputs also the sensor watch's 8 bias reading high, 16 bias reading
// low, 32 stuck, 64 locked out by the gate.
func (pe *pageEst) appendRow(b []byte, r *pageRow, v []float64) []byte {
	b = append(b, `{"seq":`...)
	b = strconv.AppendUint(b, r.seq, 10)
	b = append(b, `,"t":`...)
	b = strconv.AppendFloat(b, float64(r.t.UnixNano())/1e9, 'f', 3, 64)
	b = append(b, `,"status":`...)
	b = appendString(b, r.status.String())
	b = append(b, `,"gains":`...)
	b = appendString(b, r.gains)
	b = appendNIS(b, r.nis, r.dof, r.mean, r.lo, r.hi)
	b = append(b, `,"late":`...)
	b = appendFloat(b, r.late)
	b = append(b, `,"compute":`...)
	b = appendFloat(b, r.compute)
	b = append(b, `,"missed":`...)
	b = strconv.AppendUint(b, r.missed, 10)
	b = append(b, `,"no_gain":`...)
	b = strconv.AppendBool(b, r.noGain)
	b = append(b, `,"out":[`...)
	k := 0
	for j := 0; j < pe.p; j++ {
		if j > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		for q := 0; q < outVals; q++ {
			b = appendFloat(b, v[k+q])
			b = append(b, ',')
		}
		b = strconv.AppendInt(b, int64(flags(r.used, r.out, r.stale, j)|sensorFlags(r, j)), 10)
		b = append(b, ']')
		k += outVals
	}
	b = append(b, `],"x":`...)
	b, k = appendPairs(b, v, k, pe.n)
	b = append(b, `,"u":[`...)
	for i := 0; i < pe.m; i++ {
		if i > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		b = appendFloat(b, v[k])
		b = append(b, ',')
		b = appendFloat(b, v[k+1])
		b = append(b, ',')
		b = strconv.AppendBool(b, r.inStale&(1<<uint(i)) != 0)
		b = append(b, ']')
		k += inVals
	}
	b = append(b, `],"cand":`...)
	if !r.cand {
		return append(b, "null}"...)
	}
	b = append(b, `{"gains":`...)
	b = appendString(b, r.cGains)
	b = append(b, `,"status":`...)
	b = appendString(b, r.cStatus.String())
	b = appendNIS(b, r.cNIS, r.cDof, r.cMean, r.cLo, r.cHi)
	b = append(b, `,"out":[`...)
	for j := 0; j < pe.p; j++ {
		if j > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		for q := 0; q < cOutVals; q++ {
			b = appendFloat(b, v[k+q])
			b = append(b, ',')
		}
		b = strconv.AppendInt(b, int64(flags(r.cUsed, r.cOut, r.stale, j)), 10)
		b = append(b, ']')
		k += cOutVals
	}
	b = append(b, `],"x":`...)
	b, _ = appendPairs(b, v, k, pe.n)
	return append(b, "}}"...)
}

func appendNIS(b []byte, nis float64, dof int, mean, lo, hi float64) []byte {
	b = append(b, `,"nis":`...)
	b = appendFloat(b, nis)
	b = append(b, `,"dof":`...)
	b = strconv.AppendInt(b, int64(dof), 10)
	b = append(b, `,"nis_mean":`...)
	b = appendFloat(b, mean)
	b = append(b, `,"nis_band":[`...)
	b = appendFloat(b, lo)
	b = append(b, ',')
	b = appendFloat(b, hi)
	return append(b, ']')
}

// appendPairs writes count pairs of v from k as [[a, b], …] and returns the
// index after them.
func appendPairs(b []byte, v []float64, k, count int) ([]byte, int) {
	b = append(b, '[')
	for i := 0; i < count; i++ {
		if i > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		b = appendFloat(b, v[k])
		b = append(b, ',')
		b = appendFloat(b, v[k+1])
		b = append(b, ']')
		k += 2
	}
	return append(b, ']'), k
}

// sensorFlags returns the sensor-watch bits of output j of a row.
func sensorFlags(r *pageRow, j int) int {
	f := 0
	for _, b := range []struct {
		p   estimator.Pattern
		bit int
	}{{r.biasHi, 8}, {r.biasLo, 16}, {r.stuck, 32}, {r.locked, 64}} {
		if b.p.Has(j) {
			f |= b.bit
		}
	}
	return f
}

func flags(used, out, stale estimator.Pattern, j int) int {
	f := 0
	if used.Has(j) {
		f |= 1
	}
	if out.Has(j) {
		f |= 2
	}
	if stale.Has(j) {
		f |= 4
	}
	return f
}
