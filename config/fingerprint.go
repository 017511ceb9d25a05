package config

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"math"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// fingerprintMagic opens the canonical encoding; a change of the encoding
// changes it, so that old and new fingerprints never compare equal.
const fingerprintMagic = "surmise-model-fingerprint-v1\n"

// Fingerprint identifies the discrete model a gain set is designed for: it is
// "sha256:" followed by the lowercase hex SHA-256 of this canonical encoding
// of the model, all integers unsigned 64-bit big-endian:
//
//	the 29 bytes "surmise-model-fingerprint-v1\n"
//	n, m, p
//	A (n×n), B (n×m), C (p×n), D (p×m): each entry row by row as the IEEE 754
//	  bits of the float64 (math.Float64bits), with −0 written as +0
//	Ts as the bits of the float64 number of seconds
//	the n state, m input and p output names in order: each as its length in
//	  bytes followed by its UTF-8 bytes (a missing name list counts as empty names)
//
// These are what a gain depends on and what it is addressed by: the matrices,
// the sample time, and the names that say which state each row of L is and
// which output each column is. Units, the operating point, the noise
// covariances and the wiring are left out: a gain stays valid when they
// change (a design for other noise is no longer optimal, but its error
// dynamics are those it was checked for, and its provenance records the
// noise it was designed with). testdata/config/fingerprint.py computes the
// same encoding independently. m must be a valid model (see
// estimator.Model.Validate).
func Fingerprint(m *estimator.Model) string {
	n, nm, p := m.Dims()
	h := sha256.New()
	h.Write([]byte(fingerprintMagic))
	var buf [8]byte
	word := func(v uint64) {
		binary.BigEndian.PutUint64(buf[:], v)
		h.Write(buf[:])
	}
	number := func(v float64) {
		if v == 0 {
			v = 0 // −0 and +0 are the same model
		}
		word(math.Float64bits(v))
	}
	word(uint64(n))
	word(uint64(nm))
	word(uint64(p))
	for _, a := range []mat.Matrix{m.A, m.B, m.C, m.D} {
		r, c := a.Dims()
		for i := 0; i < r; i++ {
			for j := 0; j < c; j++ {
				number(a.At(i, j))
			}
		}
	}
	number(m.Ts)
	for _, list := range []struct {
		s    []estimator.Signal
		want int
	}{{m.States, n}, {m.Inputs, nm}, {m.Outputs, p}} {
		for i := 0; i < list.want; i++ {
			var name string
			if i < len(list.s) {
				name = list.s[i].Name
			}
			word(uint64(len(name)))
			h.Write([]byte(name))
		}
	}
	return "sha256:" + hex.EncodeToString(h.Sum(nil))
}
