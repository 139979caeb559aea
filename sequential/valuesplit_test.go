package sequential

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestValueSplitLinearInA checks the split that the kernel update relies
// on: for fixed k and s, the value log density is rest + n log a + a g,
// with rest and g computed once. The reference is the order-statistic
// density recomputed term by term from ExpWeibull (David and Nagaraja,
// Order Statistics, 3rd ed., section 2.2) at three values of a, so a
// wrong rest or g (or a g that missed the (L-n) log G_n term) fails.
func TestValueSplitLinearInA(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(13, 17))
	prior := DefaultPrior()
	prior.LogA.Sigma, prior.LogK.Sigma = 1.5, 1.5 // reach extreme kernels
	for i := range 300 {
		th := prior.DrawTheta(src)
		y, l := randomTopValues(src, 40)
		n := len(y)
		d := MustDatum(y, l)
		kn := th.kernel()
		rest, g := d.valueSplit(&kn, th.LogK-th.LogS)
		for _, la := range []float64{th.LogA, th.LogA - 0.7, th.LogA + 0.4} {
			at := th
			at.LogA = la
			want := orderStatLogDensity(at.EW(), y, l)
			got := rest + float64(n)*la + math.Exp(la)*g
			if n == 0 {
				got = rest + g
			}
			if !closeRel(got, want, 1e-10, 1e-10) {
				t.Errorf("case %d: theta %+v at log a %.3f, L %d, y %v: split gives %.17g, term-by-term %.17g", i, th, la, l, y, got, want)
			}
		}
	}
}
