package sequential

import (
	"math"
	"testing"
)

// TestSegmentLogPredictiveByHand checks SegmentLogPredictive on two
// weighted draws over four products against the formula written out
// term by term: the beta-binomial count predictive from log-gamma
// (model section 3) and the order-statistic value density (ValueLogLik,
// checked in datum_test.go), mixed by the shares of each point segment's
// other members among the draw's segments, then over the normalised
// draw weights.
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
				s := 0.0
				for _, m := range others {
					s += math.Exp(lik(d, i, int(draws[d].Labels[m]))) / float64(len(others))
				}
				total += w[d] * s
			}
			want := math.Log(total)
			if math.Abs(got[i][c]-want) > 1e-9*math.Max(1, math.Abs(want)) {
				t.Errorf("product %d segment %d: %v, want %v", i, c, got[i][c], want)
			}
		}
	}
}
