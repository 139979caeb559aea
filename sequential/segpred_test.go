package sequential

import (
	"math"
	"testing"
)

// TestSegmentLogPredictiveByHand checks SegmentLogPredictive on two
// weighted draws over four products against the formula written out
// term by term: the beta-binomial count predictive from log-gamma
// (model section 3) and the order-statistic value density (ValueLogLik,
// checked in datum_test.go) under the draw segment that holds most of
// each point segment's other members, mixed over the normalised draw
// weights.
func TestSegmentLogPredictiveByHand(t *testing.T) {
	t.Parallel()
	mk := func(v []float64, l int) *Datum { d := MustDatum(v, l); return &d }
	data := []*Datum{mk([]float64{0.8, 0.5}, 10), mk([]float64{0.7}, 10), mk([]float64{0.2, 0.15, 0.1}, 8), mk(nil, 10)}
	th := []Theta{{LogA: 0.2, LogK: 0.5, LogS: math.Log(0.4)}, {LogA: -0.1, LogK: 0.1, LogS: math.Log(0.1)}, {LogA: 0, LogK: 0, LogS: math.Log(0.3)}}
	draws := []Draw{
		{LogWeight: 0, Labels: []uint16{0, 0, 1, 1}, Segments: th[:2], Alpha: 1},
		{LogWeight: math.Log(3), Labels: []uint16{0, 2, 1, 2}, Segments: th, Alpha: 1},
	}
	partition := []int{0, 0, 1, 1}
	prior := DefaultPrior()
	got, err := SegmentLogPredictive(draws, data, partition, 2, prior)
	if err != nil {
		t.Fatal(err)
	}
	lbeta := func(a, b float64) float64 {
		x, _ := math.Lgamma(a)
		y, _ := math.Lgamma(b)
		z, _ := math.Lgamma(a + b)
		return x + y - z
	}
	logChoose := func(l, n int) float64 {
		a, _ := math.Lgamma(float64(l + 1))
		b, _ := math.Lgamma(float64(n + 1))
		c, _ := math.Lgamma(float64(l - n + 1))
		return a - b - c
	}
	// lik of product i under draw segment j of draw d, j's other members only.
	lik := func(d, i, j int) float64 {
		var rep, cons int
		for m, l := range draws[d].Labels {
			if int(l) == j && m != i {
				rep += data[m].N()
				cons += data[m].L()
			}
		}
		a, b := prior.CountA+float64(rep), prior.CountB+float64(cons-rep)
		n, l := data[i].N(), data[i].L()
		count := logChoose(l, n) + lbeta(a+float64(n), b+float64(l-n)) - lbeta(a, b)
		return count + data[i].ValueLogLik(draws[d].Segments[j])
	}
	w := []float64{0.25, 0.75}
	for i := range data {
		for c := 0; c < 2; c++ {
			total := 0.0
			for d := range draws {
				var others []int
				for m, pc := range partition {
					if pc == c && m != i {
						others = append(others, m)
					}
				}
				// The draw segment holding most of the others, the
				// lowest label on ties; i's own when there are none.
				count := map[int]int{}
				for _, m := range others {
					count[int(draws[d].Labels[m])]++
				}
				jstar, most := int(draws[d].Labels[i]), 0
				for j := 0; j < len(draws[d].Segments); j++ {
					if count[j] > most {
						jstar, most = j, count[j]
					}
				}
				total += w[d] * math.Exp(lik(d, i, jstar))
			}
			want := math.Log(total)
			if math.Abs(got[i][c]-want) > 1e-9*math.Max(1, math.Abs(want)) {
				t.Errorf("product %d segment %d: %v, want %v", i, c, got[i][c], want)
			}
		}
	}
}

// TestSegmentLogPredictiveIgnoresStrayMembers checks the property the
// representative draw segment is for: one uncertain member of a point
// segment sitting, in the only draw, with another kernel that fits the
// datum far better does not lift the segment's density towards that
// kernel's (a mixture by shares would give about log(1/4) plus it).
func TestSegmentLogPredictiveIgnoresStrayMembers(t *testing.T) {
	t.Parallel()
	mk := func(v []float64) *Datum { d := MustDatum(v, 10); return &d }
	// Four members at scale 0.05, one stray, and the product scored
	// (last) with values at scale 0.5.
	data := []*Datum{mk([]float64{0.06, 0.04}), mk([]float64{0.05}), mk([]float64{0.07, 0.05, 0.03}), mk([]float64{0.04}),
		mk([]float64{0.3}), mk([]float64{0.9, 0.6, 0.5})}
	small := Theta{LogA: 0, LogK: math.Log(1.5), LogS: math.Log(0.05)}
	large := Theta{LogA: 0, LogK: math.Log(1.5), LogS: math.Log(0.5)}
	draws := []Draw{{Labels: []uint16{0, 0, 0, 0, 1, 1}, Segments: []Theta{small, large}, Alpha: 1}}
	// Point segment 0: the four small ones and the stray; 1: the product.
	got, err := SegmentLogPredictive(draws, data, []int{0, 0, 0, 0, 0, 1}, 2, DefaultPrior())
	if err != nil {
		t.Fatal(err)
	}
	under := func(th Theta) float64 { return data[5].ValueLogLik(th) }
	gap := under(large) - under(small)
	if gap < 20 {
		t.Fatalf("the case needs a datum far better under the large kernel: gap %.1f nats", gap)
	}
	// Segment 0 is scored under the small kernel: its value part, plus a
	// count part that is the same order for both segments.
	if d := got[5][0] - got[5][1]; d > -gap+5 {
		t.Errorf("segment of four small members and one stray scores %.1f nats against the large one's segment; the kernels differ by %.1f", d, gap)
	}
}
