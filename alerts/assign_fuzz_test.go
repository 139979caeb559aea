package alerts

import (
	"encoding/binary"
	"errors"
	"math"
	"testing"
)

// FuzzAssignMax: AssignMax, the pairing of previous with new segments,
// on float matrices of any magnitude. Eight bytes make one entry. A
// non-finite entry must be refused with ErrAssign; otherwise the result
// must be a valid assignment whose total overlap equals the brute-force
// best, up to rounding (relative to the sum of magnitudes) where that sum
// is finite. FuzzAssign covers small integer matrices exactly.
func FuzzAssignMax(f *testing.F) {
	entries := func(vs ...float64) []byte {
		var b []byte
		for _, v := range vs {
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
		}
		return b
	}
	f.Add(uint8(2), uint8(2), entries(40, 35, 5, 30))
	f.Add(uint8(3), uint8(2), entries(0.1, 0.2, 1e-300, 3e300, -7, 0))
	f.Add(uint8(2), uint8(3), entries(1.5, math.Inf(1), 2, 0, 0, 0))
	f.Add(uint8(1), uint8(4), entries(1e308, 1e308, -1e308, 5))
	f.Fuzz(func(t *testing.T, rows, cols uint8, raw []byte) {
		r, c := 1+int(rows%6), 1+int(cols%6)
		if len(raw) < 8*r*c {
			return
		}
		profit := make([][]float64, r)
		finite, scale := true, 0.0
		for i := range profit {
			profit[i] = make([]float64, c)
			for j := range profit[i] {
				v := math.Float64frombits(binary.LittleEndian.Uint64(raw[8*(i*c+j):]))
				profit[i][j] = v
				finite = finite && !math.IsNaN(v) && !math.IsInf(v, 0)
				scale += math.Abs(v)
			}
		}
		got, err := AssignMax(profit)
		if !finite {
			if !errors.Is(err, ErrAssign) {
				t.Fatalf("non-finite entry: err %v, want ErrAssign", err)
			}
			return
		}
		if err != nil {
			t.Fatal(err)
		}
		neg := make([][]float64, r)
		for i := range neg {
			neg[i] = make([]float64, c)
			for j, v := range profit[i] {
				neg[i][j] = -v
			}
		}
		total, best := checkAssignment(t, neg, got), bruteForceMin(neg)
		if math.IsInf(scale, 0) || math.IsInf(total, 0) || math.IsInf(best, 0) {
			return // the sums themselves overflow: only validity is defined
		}
		if tol := 1e-9 * scale; total > best+tol {
			t.Fatalf("overlap %v, brute force %v (tolerance %v) for %v", -total, -best, tol, profit)
		}
	})
}
