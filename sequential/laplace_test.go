package sequential

import (
	"math"
	"math/big"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distmv"
)

// TestValueDerivsFiniteDifferences checks the analytic gradient and
// Hessian of the value log density (valueDerivs) against central
// differences of valueLogLik, on random data and kernels including
// products with many unreported candidates and values deep in either
// tail of G. Step 1e-4 on the log scale: the truncation error of a
// central difference is O(h^2) times the third derivative, about 1e-7
// relative here, and rounding adds 1e-16/1e-4^2 ~ 1e-8 for the second
// differences; tolerance 1e-5 relative (or absolute for small entries).
func TestValueDerivsFiniteDifferences(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(5, 6))
	const h = 1e-4
	for trial := 0; trial < 200; trial++ {
		y, l := randomTopValues(src, 12)
		if len(y) == 0 {
			continue
		}
		d := MustDatum(y, l)
		th := Theta{LogA: 1.2 * src.NormFloat64(), LogK: 0.8 * src.NormFloat64(), LogS: math.Log(0.3) + src.NormFloat64()}
		f := func(x [3]float64) float64 { return d.ValueLogLik(Theta{x[0], x[1], x[2]}) }
		var ll float64
		var g [3]float64
		var hs [6]float64
		d.valueDerivs(th.LogA, th.LogK, th.LogS, &ll, &g, &hs)
		x0 := [3]float64{th.LogA, th.LogK, th.LogS}
		if want := f(x0); !near(ll, want, 1e-9) {
			t.Fatalf("trial %d: log density %v, valueLogLik %v", trial, ll, want)
		}
		at := func(dx [3]float64) float64 {
			return f([3]float64{x0[0] + dx[0], x0[1] + dx[1], x0[2] + dx[2]})
		}
		unit := func(i int, s float64) [3]float64 { var u [3]float64; u[i] = s; return u }
		for i := 0; i < 3; i++ {
			fd := (at(unit(i, h)) - at(unit(i, -h))) / (2 * h)
			if math.Abs(g[i]-fd) > 1e-5*math.Max(1, math.Abs(fd))+50*0x1p-52*math.Abs(ll)/h {
				t.Errorf("trial %d theta %+v: gradient[%d] = %v, finite difference %v", trial, th, i, g[i], fd)
			}
		}
		idx := 0
		for i := 0; i < 3; i++ {
			for j := i; j < 3; j++ {
				var fd float64
				if i == j {
					fd = (at(unit(i, h)) - 2*at([3]float64{}) + at(unit(i, -h))) / (h * h)
				} else {
					pp := unit(i, h)
					pp[j] = h
					pm := unit(i, h)
					pm[j] = -h
					mp := unit(i, -h)
					mp[j] = h
					mm := unit(i, -h)
					mm[j] = -h
					fd = (at(pp) - at(pm) - at(mp) + at(mm)) / (4 * h * h)
				}
				round := 50 * 0x1p-52 * 4 * math.Abs(ll) / (h * h)
				if math.Abs(hs[idx]-fd) > 1e-4*math.Max(1, math.Abs(fd))+round {
					t.Errorf("trial %d theta %+v: hessian[%d][%d] = %v, finite difference %v", trial, th, i, j, hs[idx], fd)
				}
				idx++
			}
		}
	}
}

// near reports |a - b| <= tol * max(1, |b|).
func near(a, b, tol float64) bool { return math.Abs(a-b) <= tol*math.Max(1, math.Abs(b)) }

// TestKernelProposalGonum compares the proposal's log density with
// gonum v0.17.0's distmv.StudentsT built from the same centre, scale
// matrix (the inverse of the precision) and degrees of freedom, and
// checks the draws' mean and covariance: a multivariate t with nu
// degrees of freedom has covariance Sigma nu/(nu - 2) (a standard fact of
// the distribution). 200,000 draws; tolerances of about 5 standard errors.
func TestKernelProposalGonum(t *testing.T) {
	t.Parallel()
	prec := sym3{9, 2, -1, 4, 0.5, 16}
	l, ok := chol3(prec)
	if !ok {
		t.Fatal("precision not positive definite")
	}
	pr := DefaultPrior()
	var h [6]float64
	for i := range h {
		h[i] = -prec[i]
	}
	mu := Theta{0.3, -0.2, math.Log(0.3)}
	kp := proposalAt(&pr, mu, h, true)
	if kp.prec != l {
		t.Fatalf("precision factor %v, want %v", kp.prec, l)
	}
	pm := mat.NewSymDense(3, []float64{prec[0], prec[1], prec[2], prec[1], prec[3], prec[4], prec[2], prec[4], prec[5]})
	var cov mat.SymDense
	var ch mat.Cholesky
	if !ch.Factorize(pm) {
		t.Fatal("gonum: precision not positive definite")
	}
	if err := ch.InverseTo(&cov); err != nil {
		t.Fatal(err)
	}
	ref, ok := distmv.NewStudentsT([]float64{mu.LogA, mu.LogK, mu.LogS}, &cov, proposalDF, nil)
	if !ok {
		t.Fatal("gonum: StudentsT not built")
	}
	src := rand.New(rand.NewPCG(8, 9))
	for k := 0; k < 50; k++ {
		th := Theta{mu.LogA + src.NormFloat64(), mu.LogK + src.NormFloat64(), mu.LogS + 2*src.NormFloat64()}
		got, want := kp.logDensity(th), ref.LogProb([]float64{th.LogA, th.LogK, th.LogS})
		if math.Abs(got-want) > 1e-10*math.Max(1, math.Abs(want)) {
			t.Errorf("log density at %+v: %v, gonum %v", th, got, want)
		}
	}
	const n = 200000
	var sum [3]float64
	var sq [3][3]float64
	for k := 0; k < n; k++ {
		th := kp.draw(src)
		x := [3]float64{th.LogA - mu.LogA, th.LogK - mu.LogK, th.LogS - mu.LogS}
		for i := range x {
			sum[i] += x[i]
			for j := range x {
				sq[i][j] += x[i] * x[j]
			}
		}
	}
	df := float64(proposalDF)
	for i := 0; i < 3; i++ {
		sd := math.Sqrt(cov.At(i, i) * df / (df - 2))
		if m := sum[i] / n; math.Abs(m) > 5*sd/math.Sqrt(n) {
			t.Errorf("mean of coordinate %d: %v, want 0 within %v", i, m, 5*sd/math.Sqrt(n))
		}
		for j := 0; j < 3; j++ {
			want := cov.At(i, j) * df / (df - 2)
			got := sq[i][j] / n
			// The fourth moment of a t with 5 df is finite, and the sample
			// covariance's relative error is about sqrt(var/n) ~ 0.01;
			// 0.05 relative to the diagonal scale is about 5 of them.
			scale := math.Sqrt(cov.At(i, i) * cov.At(j, j) * df / (df - 2) * df / (df - 2))
			if math.Abs(got-want) > 0.05*scale {
				t.Errorf("covariance [%d][%d]: %v, want %v", i, j, got, want)
			}
		}
	}
}

// TestFitKernelReachesMode fits the kernel of simulated segments of
// several sizes and checks that the fit's centre is a stationary point of
// the conditional posterior (gradient near 0 relative to the curvature)
// and that the proposal's precision is the negative Hessian there.
func TestFitKernelReachesMode(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(10, 11))
	pr := DefaultPrior()
	for _, size := range []int{1, 3, 20, 200} {
		truth := Theta{LogA: math.Log(2), LogK: math.Log(1.5), LogS: math.Log(0.3)}
		ew := truth.EW()
		data := make([]*Datum, size)
		mem := make([]int, size)
		for i := range data {
			vals := make([]float64, 10)
			for j := range vals {
				vals[j] = ew.Rand(src)
			}
			sortDesc(vals)
			d := MustDatum(vals[:1+src.IntN(5)], 10)
			data[i] = &d
			mem[i] = i
		}
		kp := fitKernel(&pr, data, mem, Theta{pr.LogA.Mu, pr.LogK.Mu, pr.LogS.Mu}, 50)
		c := Theta{kp.mu[0], kp.mu[1], kp.mu[2]}
		_, g, h := kernelPosterior(&pr, data, mem, c)
		// Newton decrement g^T (-H)^-1 g: the fit stops once it is below
		// fitDecrement (the centre within about 0.01 standard deviations
		// of the mode); a step from there leaves it lower still.
		l, ok := chol3(sym3{-h[0], -h[1], -h[2], -h[3], -h[4], -h[5]})
		if !ok {
			t.Fatalf("size %d: Hessian at the fit is not negative definite", size)
		}
		step := cholSolve(l, g)
		dec := step[0]*g[0] + step[1]*g[1] + step[2]*g[2]
		if !(dec < fitDecrement) {
			t.Errorf("size %d: Newton decrement %v at the fit's centre %+v", size, dec, c)
		}
		if kp.prec != l {
			t.Errorf("size %d: proposal precision %v, want Cholesky factor of -H %v", size, kp.prec, l)
		}
		t.Logf("size %d: centre %+v (truth %+v), decrement %.2g", size, c, truth, dec)
	}
}

func sortDesc(x []float64) {
	for i := 1; i < len(x); i++ {
		for j := i; j > 0 && x[j] > x[j-1]; j-- {
			x[j], x[j-1] = x[j-1], x[j]
		}
	}
}

// TestValueLogLikHugeShape evaluates the value log density, its split
// form (valueSplit) and valueDerivs at kernels whose shape k is so large
// that t = k log(y/s) is astronomically negative, where (k-1) log(y/s)
// and (a-1) log G are each of size k and nearly cancel. The reference
// sums the same terms, with log G = t - z/2 (exact to far below double
// precision there), in 512-bit math/big arithmetic from the same float64
// inputs, so cancellation costs it nothing. One such kernel,
// (log a, log k, log s) = (-63.06, 42.71, 88.29), came out of a
// split-merge chain whose summed scores had cancelled to +131,072: the
// chain then stayed there for ever.
func TestValueLogLikHugeShape(t *testing.T) {
	t.Parallel()
	const prec = 512
	cases := []struct {
		vals []float64
		l    int
		th   Theta
	}{
		{[]float64{0.9, 0.7, 0.5}, 4, Theta{-63.05632214884939, 42.70650530194671, 88.29256412471689}},
		{[]float64{0.8, 0.45}, 4, Theta{-63.05632214884939, 42.70650530194671, 88.29256412471689}},
		{[]float64{0.15, 0.05}, 4, Theta{0.2, 30, 2}},
		{[]float64{0.3, 0.2, 0.1, 0.05}, 10, Theta{-10, 25, 5}},
		{[]float64{0.12}, 4, Theta{3, 12, 1}},
	}
	for _, c := range cases {
		d := MustDatum(c.vals, c.l)
		kn := c.th.kernel()
		big := func(x float64) *bigF { return newBigF(prec, x) }
		sum := big(d.logFall)
		sum.add(big(float64(d.N())).mul(big(kn.lnorm)))
		var lgLast *bigF
		for _, ly := range d.logY {
			lx := ly - kn.logS
			tt := big(kn.k).mul(big(lx))
			tf := kn.k * lx
			if !(tf < -30) {
				t.Fatalf("case %v: t = %v, want < -30", c.vals, tf)
			}
			z := math.Exp(tf)
			lg := tt.clone().add(big(-0.5 * z))
			sum.add(big(kn.k).add(big(-1)).mul(big(lx)))
			sum.add(big(-z))
			sum.add(big(kn.a).add(big(-1)).mul(lg.clone()))
			lgLast = lg
		}
		sum.add(big(float64(d.L()-d.N()) * kn.a).mul(lgLast))
		want := sum.float()
		got := d.valueLogLik(&kn)
		tol := 1e-12 * math.Max(1, math.Abs(want))
		if math.Abs(got-want) > tol {
			t.Errorf("%v at %+v: valueLogLik %v, reference %v", c.vals, c.th, got, want)
		}
		rest, g := d.valueSplit(&kn, c.th.LogK-c.th.LogS)
		if split := rest + float64(d.N())*c.th.LogA + kn.a*g; math.Abs(split-want) > tol {
			t.Errorf("%v at %+v: valueSplit gives %v, reference %v", c.vals, c.th, split, want)
		}
		var ll float64
		var gr [3]float64
		var h [6]float64
		d.valueDerivs(c.th.LogA, c.th.LogK, c.th.LogS, &ll, &gr, &h)
		// valueDerivs takes a and k from math.Exp, not the kernel's
		// table exponentials: up to an ulp of k apart, times a |x| k.
		tolD := tol + 4*0x1p-52*math.Abs(kn.a*kn.k*d.logY[0])*float64(d.L())
		if math.Abs(ll-want) > tolD {
			t.Errorf("%v at %+v: valueDerivs gives %v, reference %v", c.vals, c.th, ll, want)
		}
	}
}

// bigF is a small wrapper over math/big for the reference sums.
type bigF struct{ v *big.Float }

func newBigF(prec uint, x float64) *bigF { return &bigF{new(big.Float).SetPrec(prec).SetFloat64(x)} }
func (b *bigF) add(o *bigF) *bigF        { b.v.Add(b.v, o.v); return b }
func (b *bigF) mul(o *bigF) *bigF        { b.v.Mul(b.v, o.v); return b }
func (b *bigF) clone() *bigF             { return &bigF{new(big.Float).Copy(b.v)} }
func (b *bigF) float() float64           { f, _ := b.v.Float64(); return f }
