package sequential

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"sync"
	"testing"
	"unsafe"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/mat"
)

// This file checks both samplers against the exact posterior of a tiny
// category. With N products there are Bell(N) partitions (52 for N = 5);
// for each, alpha is integrated out of the Chinese restaurant process
// prior by one-dimensional quadrature, p is integrated out of every
// segment's count part in closed form (beta-binomial), and the kernel
// parameters (log a, log k, log s) are integrated out of every segment's
// value part by a tensor Gauss-Hermite rule against the base measure.

// exactPrior narrows the base measure to sigma 0.5 on every log
// parameter. The kernel marginals are integrals of a likelihood against
// G0; under the default sigma 1 the likelihood is a sharp ridge far in
// the tails of G0 and a tensor rule needs very many nodes. Both samplers
// are given this same prior, so the comparison is exact either way.
func exactPrior() Prior {
	p := DefaultPrior()
	p.LogA = Normal{0, 0.5}
	p.LogK = Normal{0, 0.5}
	p.LogS = Normal{math.Log(0.3), 0.5}
	return p
}

// exactData returns the tiny category of the enumeration tests: L = 4
// candidate competitors each, two products with strong rivals, two with
// weak ones and one that reports none, so that the posterior spreads over
// many partitions rather than piling onto one.
func exactData() []*Datum {
	vals := [][]float64{
		{0.9, 0.7, 0.5},
		{0.8, 0.45},
		{0.12},
		{0.15, 0.05},
		{},
	}
	out := make([]*Datum, len(vals))
	for i, v := range vals {
		d := MustDatum(v, 4)
		out[i] = &d
	}
	return out
}

// gaussHermite returns the n-point Gauss-Hermite rule for expectations
// under the standard normal, E[g(Z)] ~ sum_i w[i] g(x[i]), by the
// Golub-Welsch method: the nodes are the eigenvalues of the symmetric
// tridiagonal Jacobi matrix of the probabilists' Hermite polynomials
// (zero diagonal, off-diagonal sqrt(j)), and each weight is the squared
// first component of the unit eigenvector (the weights sum to the total
// mass 1 of the normal law).
func gaussHermite(n int) (x, w []float64) {
	jm := mat.NewSymDense(n, nil)
	for j := 1; j < n; j++ {
		jm.SetSym(j-1, j, math.Sqrt(float64(j)))
	}
	var es mat.EigenSym
	if !es.Factorize(jm, true) {
		panic("gaussHermite: eigendecomposition failed")
	}
	x = es.Values(nil)
	var v mat.Dense
	es.VectorsTo(&v)
	w = make([]float64, n)
	for i := range w {
		w[i] = v.At(0, i) * v.At(0, i)
	}
	return x, w
}

// enumeration holds the exact posterior ingredients of a tiny category.
type enumeration struct {
	prior Prior
	data  []*Datum
	// logBlock[mask] is the log marginal likelihood of the products in the
	// bitmask forming one segment: beta-binomial count part (with the
	// C(L, n) factors) plus the kernel marginal of the value parts.
	logBlock []float64
	// logKernel[mask] is the kernel marginal alone,
	// log E_G0[prod_i exp(ValueLogLik_i(theta))].
	logKernel []float64
	// logAlphaK[K] = log int alpha^K Gamma(alpha)/Gamma(alpha+N) p(alpha) d alpha,
	// the CRP prior of a partition with K segments up to prod (n_k - 1)!.
	logAlphaK []float64
}

// newEnumeration integrates the kernel with a q^3 Gauss-Hermite tensor
// rule and alpha with an nAlpha-point Gauss-Legendre rule.
func newEnumeration(prior Prior, data []*Datum, q, nAlpha int) *enumeration {
	n := len(data)
	e := &enumeration{prior: prior, data: data}
	e.logKernel = kernelMarginals(prior, data, q)
	e.logBlock = make([]float64, 1<<n)
	for mask := 1; mask < 1<<n; mask++ {
		var lc float64
		var rep, con int
		for i, d := range data {
			if mask&(1<<i) == 0 {
				continue
			}
			lc += logChooseInt(d.L(), d.N())
			rep += d.N()
			con += d.L()
		}
		lc += lbeta(prior.CountA+float64(rep), prior.CountB+float64(con-rep)) - lbeta(prior.CountA, prior.CountB)
		e.logBlock[mask] = lc + e.logKernel[mask]
	}
	e.logAlphaK = make([]float64, n+1)
	e.logAlphaK[0] = math.Inf(-1)
	for k := 1; k <= n; k++ {
		e.logAlphaK[k] = math.Log(alphaIntegral(prior, n, k, nAlpha))
	}
	return e
}

func logChooseInt(l, n int) float64 {
	a, _ := math.Lgamma(float64(l + 1))
	b, _ := math.Lgamma(float64(n + 1))
	c, _ := math.Lgamma(float64(l - n + 1))
	return a - b - c
}

// kernelMarginals returns, for every non-empty subset of data (by
// bitmask), log E_G0[exp(sum_i ValueLogLik_i(theta))] by a q^3 tensor
// Gauss-Hermite rule over (log a, log k, log s).
func kernelMarginals(prior Prior, data []*Datum, q int) []float64 {
	x, w := gaussHermite(q)
	n := len(data)
	nodes := q * q * q
	logw := make([]float64, nodes)
	ll := make([]float64, nodes*n)
	node := 0
	for i := 0; i < q; i++ {
		for j := 0; j < q; j++ {
			for k := 0; k < q; k++ {
				th := Theta{
					LogA: prior.LogA.Mu + prior.LogA.Sigma*x[i],
					LogK: prior.LogK.Mu + prior.LogK.Sigma*x[j],
					LogS: prior.LogS.Mu + prior.LogS.Sigma*x[k],
				}
				logw[node] = math.Log(w[i]) + math.Log(w[j]) + math.Log(w[k])
				for d := range data {
					ll[node*n+d] = refValueLogLik(data[d], th)
				}
				node++
			}
		}
	}
	out := make([]float64, 1<<n)
	terms := make([]float64, nodes)
	for mask := 1; mask < 1<<n; mask++ {
		for v := 0; v < nodes; v++ {
			t := logw[v]
			for d := 0; d < n; d++ {
				if mask&(1<<d) != 0 {
					t += ll[v*n+d]
				}
			}
			terms[v] = t
		}
		out[mask] = logSumExp(terms)
	}
	return out
}

// refValueLogLik is the value part of model section 2 written out
// independently of Datum.ValueLogLik, for the quadrature: the top n of L
// order statistics, log(L!/(L-n)!) + sum_m log f(y_m) + (L-n) log F(y_n).
// The outer Gauss-Hermite nodes reach 5.7 sigma, where (y/s)^k can
// underflow; log G = log(1 - exp(-z)) is then taken from log z by its
// series log z - z/2, so the integrand stays finite.
func refValueLogLik(d *Datum, th Theta) float64 {
	n := d.N()
	if n == 0 {
		return 0
	}
	a, k := math.Exp(th.LogA), math.Exp(th.LogK)
	lf, _ := math.Lgamma(float64(d.L() + 1))
	lfn, _ := math.Lgamma(float64(d.L() - n + 1))
	out := lf - lfn
	var logG float64
	for _, y := range d.Values() {
		lx := math.Log(y) - th.LogS
		lz := k * lx
		z := math.Exp(lz)
		switch {
		case z < 1e-8:
			logG = lz - z/2
		case z <= math.Ln2:
			logG = math.Log(-math.Expm1(-z))
		default:
			logG = math.Log1p(-math.Exp(-z))
		}
		out += th.LogA + th.LogK - th.LogS + (k-1)*lx - z + (a-1)*logG
	}
	return out + float64(d.L()-n)*a*logG
}

// alphaIntegral returns int_0^inf alpha^k Gamma(alpha)/Gamma(alpha+n)
// Gamma(alpha; shape, rate) d alpha by Gauss-Legendre on u = log alpha
// over [-45, 8]: the integrand vanishes like alpha^(k+shape) at 0 (below
// e^-45 it contributes less than 1e-19) and like exp(-rate alpha) above.
func alphaIntegral(prior Prior, n, k, nodes int) float64 {
	a0, b0 := prior.AlphaShape, prior.AlphaRate
	lgA0, _ := math.Lgamma(a0)
	f := func(u float64) float64 {
		al := math.Exp(u)
		g1, _ := math.Lgamma(al)
		g2, _ := math.Lgamma(al + float64(n))
		logPrior := a0*math.Log(b0) - lgA0 + (a0-1)*u - b0*al
		return math.Exp(float64(k)*u + g1 - g2 + logPrior + u) // + u: d alpha = alpha du
	}
	return quad.Fixed(f, -45, 8, nodes, quad.Legendre{}, 0)
}

// exactPosterior is the posterior over the partitions of a tiny category.
type exactPosterior struct {
	parts       [][]int // restricted growth strings
	prob        []float64
	logPrior    []float64 // log prior probability of each partition
	logEvidence float64   // log p(data), all normalising constants kept
}

// restrictedGrowth enumerates every partition of n items as a restricted
// growth string (z[0] = 0, z[i] <= 1 + max(z[:i])): Bell(n) of them.
func restrictedGrowth(n int) [][]int {
	var out [][]int
	z := make([]int, n)
	var rec func(i, top int)
	rec = func(i, top int) {
		if i == n {
			out = append(out, append([]int(nil), z...))
			return
		}
		for c := 0; c <= top+1; c++ {
			z[i] = c
			rec(i+1, max(top, c))
		}
	}
	if n > 0 {
		rec(1, 0)
	}
	return out
}

// posterior assembles the exact posterior from the ingredients.
func (e *enumeration) posterior() exactPosterior {
	n := len(e.data)
	ep := exactPosterior{parts: restrictedGrowth(n)}
	logJoint := make([]float64, len(ep.parts))
	ep.logPrior = make([]float64, len(ep.parts))
	for j, z := range ep.parts {
		k := 0
		for _, c := range z {
			k = max(k, c+1)
		}
		masks := make([]int, k)
		for i, c := range z {
			masks[c] |= 1 << i
		}
		lp := e.logAlphaK[k]
		ll := 0.0
		for _, m := range masks {
			size := 0
			for i := 0; i < n; i++ {
				if m&(1<<i) != 0 {
					size++
				}
			}
			lg, _ := math.Lgamma(float64(size)) // (n_k - 1)!
			lp += lg
			ll += e.logBlock[m]
		}
		ep.logPrior[j] = lp
		logJoint[j] = lp + ll
	}
	ep.logEvidence = logSumExp(logJoint)
	ep.prob = make([]float64, len(ep.parts))
	for j := range ep.prob {
		ep.prob[j] = math.Exp(logJoint[j] - ep.logEvidence)
	}
	return ep
}

// partitionKey returns the canonical key of a labelling: labels renamed
// 0, 1, 2, ... in order of first appearance, one byte per product.
func partitionKey[L ~uint16 | ~int](labels []L) string {
	names := map[L]byte{}
	key := make([]byte, len(labels))
	for i, c := range labels {
		v, ok := names[c]
		if !ok {
			v = byte(len(names))
			names[c] = v
		}
		key[i] = v
	}
	return string(key)
}

// numBlocks returns the number of distinct labels of a canonical key.
func numBlocks(key string) int {
	k := 0
	for i := 0; i < len(key); i++ {
		k = max(k, int(key[i])+1)
	}
	return k
}

// drawPartitionPosterior returns the weighted distribution of canonical
// partitions over draws (equal weights when every LogWeight is equal).
func drawPartitionPosterior(draws []Draw) map[string]float64 {
	w := logWeightsToProbs(draws)
	out := map[string]float64{}
	for d, dr := range draws {
		out[partitionKey(dr.Labels)] += w[d]
	}
	return out
}

func logWeightsToProbs(draws []Draw) []float64 {
	m := math.Inf(-1)
	for _, d := range draws {
		m = math.Max(m, d.LogWeight)
	}
	w := make([]float64, len(draws))
	s := 0.0
	for i, d := range draws {
		w[i] = math.Exp(d.LogWeight - m)
		s += w[i]
	}
	for i := range w {
		w[i] /= s
	}
	return w
}

// exactMaps returns the exact posterior as a map keyed like
// drawPartitionPosterior, and the exact posterior of the number of
// segments.
func (ep exactPosterior) maps() (parts map[string]float64, ks map[int]float64) {
	parts = map[string]float64{}
	ks = map[int]float64{}
	for j, z := range ep.parts {
		key := partitionKey(z)
		parts[key] += ep.prob[j]
		ks[numBlocks(key)] += ep.prob[j]
	}
	return parts, ks
}

func blockCounts(parts map[string]float64) map[int]float64 {
	ks := map[int]float64{}
	for key, p := range parts {
		ks[numBlocks(key)] += p
	}
	return ks
}

// totalVariation returns (1/2) sum |p - q| over the union of the keys.
func totalVariation[K comparable](p, q map[K]float64) float64 {
	s := 0.0
	for k, v := range p {
		s += math.Abs(v - q[k])
	}
	for k, v := range q {
		if _, ok := p[k]; !ok {
			s += math.Abs(v)
		}
	}
	return s / 2
}

// iidTV returns the expected total variation between a distribution p and
// the empirical distribution of n independent draws from it, from the
// normal approximation E|phat - p| = sqrt(2 p (1 - p) / (pi n)) per cell.
func iidTV[K comparable](p map[K]float64, n float64) float64 {
	s := 0.0
	for _, v := range p {
		s += math.Sqrt(2 * v * (1 - v) / (math.Pi * n))
	}
	return s / 2
}

// exactFive is the enumeration of exactData under exactPrior, shared by
// the tests (computed once; about 0.1 s).
var exactFive = sync.OnceValue(func() *enumeration {
	return newEnumeration(exactPrior(), exactData(), exactGHNodes, 400)
})

// exactGHNodes is the Gauss-Hermite rule size per axis;
// TestEnumerationConverged shows that doubling it changes no block
// marginal by more than 1e-4 relative.
const exactGHNodes = 40

// TestGaussHermiteRule checks the Golub-Welsch rule two ways: it
// integrates the normal moments E[Z^2j] = (2j-1)!! exactly up to degree
// 2n-1, and its nodes and weights agree with gonum v0.17.0's quad.Hermite
// rule (for the weight exp(-x^2), so nodes scale by sqrt 2 and weights by
// 1/sqrt(pi)).
func TestGaussHermiteRule(t *testing.T) {
	t.Parallel()
	const n = 20
	x, w := gaussHermite(n)
	for j := 0; 2*j <= 2*n-1; j++ {
		got := 0.0
		for i := range x {
			got += w[i] * math.Pow(x[i], float64(2*j))
		}
		want := 1.0
		for m := 2*j - 1; m > 1; m -= 2 {
			want *= float64(m)
		}
		// Moments grow to 37!! ~ 3e21; the sum of n positive terms is
		// accurate to a few ulps of the largest.
		if math.Abs(got-want) > 1e-12*want {
			t.Errorf("E[Z^%d]: rule gives %.17g, want %.17g", 2*j, got, want)
		}
	}
	gx := make([]float64, n)
	gw := make([]float64, n)
	quad.Hermite{}.FixedLocations(gx, gw, math.Inf(-1), math.Inf(1))
	for i := range x {
		// Both lists ascend. The eigen solver's node error is about
		// eps ||J|| ~ 1e-15 sqrt(n); weights carry an absolute error near
		// eps times the largest weight.
		if d := math.Abs(x[i] - gx[i]*math.Sqrt2); d > 1e-12 {
			t.Errorf("node %d: %.17g, gonum %.17g", i, x[i], gx[i]*math.Sqrt2)
		}
		if d := math.Abs(w[i] - gw[i]/math.Sqrt(math.Pi)); d > 1e-13 {
			t.Errorf("weight %d: %.17g, gonum %.17g", i, w[i], gw[i]/math.Sqrt(math.Pi))
		}
	}
}

// TestEnumerationConverged shows the quadratures are converged: doubling
// the Gauss-Hermite rule (40 to 80 nodes per axis) moves no block's kernel
// marginal by more than 1e-4 relative, halving the Legendre rule moves no
// alpha integral by more than 1e-10 relative, the CRP prior integrated
// over alpha sums to 1 over the 52 partitions, and its mean number of
// segments matches Antoniak's formula. With -short the 80-node rule
// (half a million nodes) is replaced by 48 nodes per axis, a weaker but
// cheaper check of the same kind.
func TestEnumerationConverged(t *testing.T) {
	t.Parallel()
	e := exactFive()
	other := 2 * exactGHNodes
	if testing.Short() {
		other = 48
	}
	alt := kernelMarginals(e.prior, e.data, other)
	worst := 0.0
	for mask := 1; mask < len(alt); mask++ {
		worst = math.Max(worst, math.Abs(math.Expm1(alt[mask]-e.logKernel[mask])))
	}
	t.Logf("largest relative change of a kernel marginal, %d vs %d nodes per axis: %.2g", exactGHNodes, other, worst)
	if !(worst <= 1e-4) {
		t.Errorf("kernel marginals not converged: relative change %.3g > 1e-4", worst)
	}
	n := len(e.data)
	for k := 1; k <= n; k++ {
		h := alphaIntegral(e.prior, n, k, 200)
		if r := math.Abs(h/math.Exp(e.logAlphaK[k]) - 1); r > 1e-10 {
			t.Errorf("alpha integral K=%d: 200 vs 400 nodes differ by %.3g relative", k, r)
		}
	}
	ep := e.posterior()
	if len(ep.parts) != 52 {
		t.Fatalf("%d partitions of 5, want Bell(5) = 52", len(ep.parts))
	}
	sum := 0.0
	for _, lp := range ep.logPrior {
		sum += math.Exp(lp)
	}
	if math.Abs(sum-1) > 1e-10 {
		t.Errorf("prior over partitions sums to %.15g, want 1", sum)
	}
	// Antoniak (1974): E[K | alpha] = sum_{i<n} alpha/(alpha+i); its prior
	// mean over alpha must match the enumeration's E[K]. Integrate it
	// with the same Legendre rule.
	ek := 0.0
	for j, z := range ep.parts {
		ek += math.Exp(ep.logPrior[j]) * float64(numBlocks(partitionKey(z)))
	}
	a0, b0 := e.prior.AlphaShape, e.prior.AlphaRate
	lgA0, _ := math.Lgamma(a0)
	want := quad.Fixed(func(u float64) float64 {
		al := math.Exp(u)
		s := 0.0
		for i := 0; i < n; i++ {
			s += al / (al + float64(i))
		}
		return s * math.Exp(a0*math.Log(b0)-lgA0+(a0-1)*u-b0*al+u)
	}, -45, 8, 400, quad.Legendre{}, 0)
	if math.Abs(ek-want) > 1e-9 {
		t.Errorf("prior E[K] from enumeration %.12g, Antoniak %.12g", ek, want)
	}
	_, ks := ep.maps()
	t.Logf("exact posterior of K: %v; log evidence %.6f", ks, ep.logEvidence)
}

// exactParticles builds a particle system over data from an empty
// population (Build with no products): Add one product at a time with a
// settle (default budget) after each, then extra waste-free steps.
func exactParticles(t testing.TB, prior Prior, data []*Datum, particles int, seed uint64, extra int) *Particles {
	t.Helper()
	cfg := DefaultParticleConfig()
	cfg.Prior = prior
	cfg.Particles = particles
	ps, err := NewParticles(cfg, seed, 7)
	if err != nil {
		t.Fatal(err)
	}
	ps.Build()
	for i, d := range data {
		if _, err := ps.Add(exactID(i), *d); err != nil {
			t.Fatal(err)
		}
		ps.Settle()
	}
	for j := 0; j < extra; j++ {
		ps.SettleRefit()
	}
	return ps
}

func exactID(i int) string { return string(rune('a' + i)) }

// exactParticleCount is P for the enumeration comparisons.
func exactParticleCount() int {
	if testing.Short() {
		return 500
	}
	return 2000
}

// exactBase is the encoding of the particle system on exactData, built
// once (by the first test that asks, which reports any failure) and
// decoded afresh by every test that needs one.
var (
	exactBaseOnce sync.Once
	exactBaseVal  []byte
)

func exactSystem(t *testing.T) *Particles {
	t.Helper()
	exactBaseOnce.Do(func() {
		e := exactFive()
		exactBaseVal = exactParticles(t, e.prior, e.data, exactParticleCount(), 11, 3).Encode()
	})
	if exactBaseVal == nil {
		t.Fatal("the shared particle system could not be built")
	}
	ps, err := DecodeParticles(exactBaseVal, 0)
	if err != nil {
		t.Fatal(err)
	}
	return ps
}

// checkExact compares a particle system's weighted posterior over
// partitions (of the products in slot order) and over the number of
// segments with the exact posterior.
//
// Tolerance: for n independent draws the expected total variation is
// about iidTV(n) = (1/2) sum_c sqrt(2 p_c (1 - p_c) / (pi n)). Over 52
// cells the TV is a sum of many small terms and varies little around its
// mean; over the 5 values of K it is more variable. The particles are not
// independent (resampling duplicates them, and rejuvenation only partly
// undoes it); with n the effective size, seeds 100-107 gave TV / iidTV(P)
// between 0.95 and 1.44 over partitions and up to 1.84 over K. We allow
// 2.5 iidTV(n) over partitions and 3.5 iidTV(n) over K. The checks below
// log the TV that the named bug would give, which is well above these.
func checkExact(t *testing.T, what string, ps *Particles, n float64, want map[string]float64) {
	t.Helper()
	wantK := blockCounts(want)
	got := drawPartitionPosterior(ps.Draws())
	gotK := blockCounts(got)
	tv, tvK := totalVariation(got, want), totalVariation(gotK, wantK)
	tol, tolK := 2.5*iidTV(want, n), 3.5*iidTV(wantK, n)
	t.Logf("%s: P=%d n=%.0f ESS=%.0f diversity=%d: TV over partitions %.4f (tol %.4f), TV of K %.4f (tol %.4f)",
		what, ps.NumParticles(), n, ps.ESS(), ps.Diversity(), tv, tol, tvK, tolK)
	if !(tv <= tol) {
		t.Errorf("%s: TV over partitions %.4f > %.4f", what, tv, tol)
	}
	if !(tvK <= tolK) {
		t.Errorf("%s: TV of the number of segments %.4f > %.4f\nparticles %v\nexact     %v", what, tvK, tolK, gotK, wantK)
	}
}

// TestExactPosteriorParticles compares the particle system built by Adds
// and settles with the exact posterior of the five products.
func TestExactPosteriorParticles(t *testing.T) {
	t.Parallel()
	want, _ := exactFive().posterior().maps()
	ps := exactSystem(t)
	checkExact(t, "after adds", ps, float64(ps.NumParticles()), want)
}

// TestExactRemove adds a sixth product, mixes, then removes it with no
// rejuvenation afterwards, so that the partitions of the five others are
// exactly those the six-product particles carried and only Remove's
// incremental weight can turn them back into the five-product posterior.
// Resampling is switched off for the Remove so that the weighted
// particles are compared as they stand, with their ESS as the effective
// sample size.
//
// The weight (N - 1 + alpha) / Z is the reciprocal of a predictive
// density, so its spread is large: here the ESS falls from P to about
// P/2, and for a product with four strong rivals it fell to P/25. The
// logged power figure is the TV that a Remove ignoring its weight would
// leave; with P = 2000 it is close to the tolerance, so this check
// guards against gross errors and TestAddRemoveMatchesReference (30
// products) complements it.
func TestExactRemove(t *testing.T) {
	t.Parallel()
	e := exactFive()
	want, _ := e.posterior().maps()
	extra := MustDatum([]float64{0.6, 0.5, 0.4}, 4)

	six := newEnumeration(e.prior, append(exactData(), &extra), 24, 200).posterior()
	marg := map[string]float64{}
	for j, z := range six.parts {
		marg[partitionKey(z[:5])] += six.prob[j]
	}
	t.Logf("power: TV between the five products' posteriors with and without the sixth: %.3f", totalVariation(marg, want))

	ps := exactSystem(t)
	if _, err := ps.Add("x", extra); err != nil {
		t.Fatal(err)
	}
	ps.Settle()
	ps.Settle()
	ps.cfg.ESSFraction = 1e-9
	if err := ps.Remove("x"); err != nil {
		t.Fatal(err)
	}
	checkExact(t, "after adding and removing a product", ps, ps.ESS(), want)
}

// TestExactReplace checks both forms of a Replace against the exact
// posterior. "redraw" forces the Algorithm-8 redraw (KeepESS 0): it
// replaces every product with its own datum, then one product with a
// different datum, each time with the lightest settle (one pass over the
// touched product only). "keep" forces the kept assignment (any KeepESS
// above 0 accepts it unless every weight is zero): the same replaces by
// the products' own data, whose weights f(y)/f(y) are 1, then the change,
// with resampling switched off and no settle, so that only the weight
// f(new)/f(old) can turn the old posterior into the new one; the ESS is
// the effective sample size. The logged TV between the two exact
// posteriors is what a Replace ignoring its weight would leave.
func TestExactReplace(t *testing.T) {
	t.Parallel()
	e := exactFive()
	want, _ := e.posterior().maps()
	for _, tc := range []struct {
		name    string
		keepESS float64
		changed []float64
	}{
		{"redraw", 0, []float64{0.6, 0.5, 0.4}},
		// A re-estimate: one more competitor reported and the first
		// one stronger, so both the count and the value part of the
		// weight matter.
		{"keep", 1e-9, []float64{0.4, 0.1}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			data := exactData()
			changed := MustDatum(tc.changed, 4)
			data[2] = &changed
			post2 := newEnumeration(e.prior, data, exactGHNodes, 400).posterior()
			want2, _ := post2.maps()
			t.Logf("TV between the posteriors before and after the change: %.3f", totalVariation(want, want2))
			// The surprise of the change is log p(new | others): the log
			// evidence with the new datum minus that of the four others.
			others := append(exactData()[:2:2], exactData()[3:]...)
			logEvOthers := newEnumeration(e.prior, others, exactGHNodes, 400).posterior().logEvidence
			wantLP := post2.logEvidence - logEvOthers
			t.Logf("power: the log predictive ratio p(new | others)/p(old | others) is %.4f", post2.logEvidence-e.posterior().logEvidence)
			checkSurprise := func(lp float64) {
				t.Helper()
				t.Logf("surprise %.4f, exact log p(new | others) %.4f", lp, wantLP)
				if math.Abs(lp-wantLP) > exactSurpriseTol {
					t.Errorf("surprise %.4f, exact %.4f: off by more than %.2f", lp, wantLP, exactSurpriseTol)
				}
			}
			ps := exactSystem(t)
			ps.cfg.KeepESS = tc.keepESS
			ps.SetRejuvenation(1, 0)
			minESS := float64(ps.NumParticles())
			for i, d := range e.data {
				if _, err := ps.Replace(exactID(i), *d); err != nil {
					t.Fatal(err)
				}
				minESS = math.Min(minESS, ps.ESS())
				ps.Settle()
			}
			checkExact(t, "after replacing every datum by itself", ps, minESS, want)
			keeping := tc.keepESS > 0
			if keeping {
				ps.cfg.ESSFraction = 1e-9
			}
			before := slices.Clone(ps.Draws()[0].Labels)
			lp, err := ps.Replace(exactID(2), changed)
			if err != nil {
				t.Fatal(err)
			}
			wantKept := uint64(0)
			if keeping {
				wantKept = 6
			}
			if k, r := ps.ReplaceForms(); k != wantKept || r != 6-wantKept {
				t.Fatalf("replace forms: %d kept, %d redrawn; want %d kept, %d redrawn", k, r, wantKept, 6-wantKept)
			}
			checkSurprise(lp)
			if !keeping {
				n := ps.ESS()
				ps.Settle()
				checkExact(t, "after replacing product c", ps, math.Min(n, minESS), want2)
				return
			}
			if got := ps.Draws()[0].Labels; !slices.Equal(got, before) {
				t.Fatalf("keeping Replace changed particle 0's labels from %v to %v", before, got)
			}
			checkExact(t, "after replacing product c, assignments kept", ps, ps.ESS(), want2)
			// Decoding checks every segment's count totals against its
			// members' data: the kept assignment must have moved them.
			if _, err := DecodeParticles(ps.Encode(), 1); err != nil {
				t.Fatalf("state after a keeping Replace: %v", err)
			}
			// The probability that c shares a segment with each other
			// product: a sharper test of the weight than the TV. The
			// bound is 4 binomial standard errors at the ESS.
			got := drawPartitionPosterior(ps.Draws())
			for j := range 5 {
				if j == 2 {
					continue
				}
				g, w, old := coSegment(got, 2, j), coSegment(want2, 2, j), coSegment(want, 2, j)
				tol := 4 * math.Sqrt(w*(1-w)/ps.ESS())
				t.Logf("P(c with %s): particles %.4f, exact %.4f (before the change %.4f), tolerance %.4f", exactID(j), g, w, old, tol)
				if math.Abs(g-w) > tol {
					t.Errorf("P(c with %s) = %.4f, exact %.4f: off by more than %.4f", exactID(j), g, w, tol)
				}
			}
		})
	}
}

// exactSurpriseTol bounds the error of a Replace's surprise against the
// exact log predictive. The keeping form estimates it on 32 particles;
// its error here was 0.03-0.07 nats over two random paths, the redraw's 0.02;
// a surprise that reported the log predictive ratio instead, the keep
// weights' own mean, would be off by log p(old | others).
const exactSurpriseTol = 0.25

// coSegment returns the probability that products i and j share a
// segment under a distribution over partition keys.
func coSegment(parts map[string]float64, i, j int) float64 {
	p := 0.0
	for key, q := range parts {
		if key[i] == key[j] {
			p += q
		}
	}
	return p
}

// TestExactPosteriorGibbs compares the batch sampler's posterior over
// partitions with the exact one. Successive sweeps are correlated: the
// TV of 39,500 draws came out 1.2 times the independent-draw value over
// partitions and 2 times over K, so the effective sample size is taken
// as draws/4 (TV doubles) and the tolerances are those of checkExact.
func TestExactPosteriorGibbs(t *testing.T) {
	t.Parallel()
	sweeps := 40000
	if testing.Short() {
		sweeps = 8000
	}
	e := exactFive()
	want, wantK := e.posterior().maps()
	src := rand.New(rand.NewPCG(21, 22))
	cfg := GibbsConfig{Prior: e.prior, Aux: 3, Sweeps: sweeps, Burn: 500, Thin: 1}
	g, err := NewGibbs(e.data, cfg, src)
	if err != nil {
		t.Fatal(err)
	}
	draws := g.Run(src, nil)
	got := drawPartitionPosterior(draws)
	gotK := blockCounts(got)
	neff := float64(len(draws)) / 4
	tv, tvK := totalVariation(got, want), totalVariation(gotK, wantK)
	tol, tolK := 2.5*iidTV(want, neff), 3.5*iidTV(wantK, neff)
	t.Logf("%d draws: TV over partitions %.4f (tol %.4f), TV of K %.4f (tol %.4f)", len(draws), tv, tol, tvK, tolK)
	if !(tv <= tol) {
		t.Errorf("Gibbs: TV over partitions %.4f > %.4f", tv, tol)
	}
	if !(tvK <= tolK) {
		t.Errorf("Gibbs: TV of the number of segments %.4f > %.4f\nGibbs %v\nexact %v", tvK, tolK, gotK, wantK)
	}
}

// TestExactLogEvidence checks the running evidence estimate on three
// products against (a) the exact log marginal likelihood from the
// enumeration and (b) plain importance sampling from the prior.
//
// Tolerances. (b) The importance estimate log(mean of M likelihoods) has
// standard error sd/(mean sqrt M) by the delta method; we allow 4 of
// them. (a) Each particle run's LogEvidence is the log of an unbiased
// estimate, so its mean over runs sits below the truth by about half its
// variance; with S runs of sample standard deviation s the allowance is
// t_{S-1, 0.995} s / sqrt(S) + s^2/2, plus 1e-4 for the quadrature.
func TestExactLogEvidence(t *testing.T) {
	t.Parallel()
	P, seeds, draws := 1000, 6, 200000
	if testing.Short() {
		P, draws = 200, 50000
	}
	prior := exactPrior()
	data := exactData()[:3]
	data[1] = exactData()[2] // {0.9 0.7 0.5}, {0.12}, {0.15 0.05}
	data[2] = exactData()[3]
	exact := newEnumeration(prior, data, exactGHNodes, 400).posterior().logEvidence

	var runs []float64
	for s := 0; s < seeds; s++ {
		ps := exactParticles(t, prior, data, P, uint64(300+s), 0)
		runs = append(runs, ps.LogEvidence())
	}
	m, v := meanAndVar(runs)
	sd := math.Sqrt(v)
	const t995df5 = 4.032 // Student t quantile, 5 degrees of freedom
	tolP := t995df5*sd/math.Sqrt(float64(seeds)) + v/2 + 1e-4

	src := rand.New(rand.NewPCG(31, 32))
	lik := make([]float64, draws)
	for j := range lik {
		lik[j] = math.Exp(priorPredictiveLogLik(prior, data, src))
	}
	lm, lv := meanAndVar(lik)
	is := math.Log(lm)
	se := math.Sqrt(lv/float64(draws)) / lm
	t.Logf("log evidence: exact %.5f, importance sampling %.5f (se %.5f), particles mean %.5f sd %.5f over %d runs of P=%d",
		exact, is, se, m, sd, seeds, P)
	if !(math.Abs(is-exact) <= 4*se+1e-4) {
		t.Errorf("importance sampling %.5f vs exact %.5f: more than 4 se (%.5f) apart", is, exact, se)
	}
	if !(math.Abs(m-exact) <= tolP) {
		t.Errorf("particles' log evidence %.5f vs exact %.5f: differ by more than %.5f", m, exact, tolP)
	}
}

func meanAndVar(x []float64) (float64, float64) {
	m := 0.0
	for _, v := range x {
		m += v
	}
	m /= float64(len(x))
	ss := 0.0
	for _, v := range x {
		ss += (v - m) * (v - m)
	}
	return m, ss / float64(len(x)-1)
}

// priorPredictiveLogLik draws alpha, a partition by the Chinese restaurant
// process and one theta per segment from the prior, and returns the log
// likelihood of the data with each segment's p integrated out
// (beta-binomial, C(L, n) factors kept).
func priorPredictiveLogLik(prior Prior, data []*Datum, src *rand.Rand) float64 {
	alpha := prior.DrawAlpha(src)
	var sizes []int
	z := make([]int, len(data))
	for i := range data {
		u := src.Float64() * (float64(i) + alpha)
		c := len(sizes)
		acc := 0.0
		for k, n := range sizes {
			acc += float64(n)
			if u < acc {
				c = k
				break
			}
		}
		if c == len(sizes) {
			sizes = append(sizes, 0)
		}
		sizes[c]++
		z[i] = c
	}
	ll := 0.0
	for c := range sizes {
		th := prior.DrawTheta(src)
		var rep, con int
		for i, d := range data {
			if z[i] != c {
				continue
			}
			ll += logChooseInt(d.L(), d.N()) + refValueLogLik(d, th)
			rep += d.N()
			con += d.L()
		}
		ll += lbeta(prior.CountA+float64(rep), prior.CountB+float64(con-rep)) - lbeta(prior.CountA, prior.CountB)
	}
	return ll
}

// TestValueLogLikUnderflow evaluates the value part where z = (y/s)^k
// underflows to 0 (k near 190 or 200 with y/s of a few hundredths): the
// true log likelihood is finite, since log G(y) = log(1 - exp(-z)) ~
// log z = k log(y/s). Taking log G = -Inf there instead would form
// (a-1)(-Inf) + (L-n) a (-Inf), NaN when a < 1, and 0 * (-Inf) = NaN
// whenever n = L. Such thetas are 5 to 6 prior sigmas out, reachable by
// the auxiliary draws of Algorithm 8 and by the kernel update's
// proposals, and small relative elasticities bring them closer (y/s = 1e-5
// underflows from k = 65). One NaN would make predictiveTerms' running
// maximum NaN, that particle's increment NaN, and then every particle's
// log weight NaN through the renormalisation in applyIncrements. The
// reference is refValueLogLik, which takes log G from log z.
func TestValueLogLikUnderflow(t *testing.T) {
	t.Parallel()
	cases := []struct {
		vals []float64
		l    int
		th   Theta
	}{
		// a < 1, n < L: (a-1)(-Inf) + (L-n) a (-Inf)
		{[]float64{0.9, 0.7, 0.5}, 4, Theta{LogA: -5.7266889207743645, LogK: 5.240780267337134, LogS: 3.270779467601842}},
		// n = L: 0 * (-Inf), whatever a is
		{[]float64{0.02, 0.01}, 2, Theta{LogA: -1, LogK: 5.3, LogS: 0}},
		{[]float64{0.02}, 1, Theta{LogA: 1, LogK: 5.3, LogS: 0}},
		// a tiny relative elasticity at a moderate shape
		{[]float64{0.3, 3e-6}, 2, Theta{LogA: 0.5, LogK: math.Log(65), LogS: math.Log(0.3)}},
	}
	for _, c := range cases {
		d := MustDatum(c.vals, c.l)
		got := d.ValueLogLik(c.th)
		want := refValueLogLik(&d, c.th)
		if math.IsNaN(want) || math.IsInf(want, 0) {
			t.Fatalf("reference not finite for %v at %+v", c.vals, c.th)
		}
		if !(math.Abs(got-want) <= 1e-9*math.Abs(want)) {
			t.Errorf("ValueLogLik(%v, L=%d) at %+v = %v, want %.10g (finite)", c.vals, c.l, c.th, got, want)
		}
	}
}

// handValueLogLik is the value part assembled from ExpWeibull's LogProb
// and LogCDF (checked against SciPy elsewhere), independently of
// Datum.ValueLogLik.
func handValueLogLik(d *Datum, th Theta) float64 {
	n := d.N()
	if n == 0 {
		return 0
	}
	ew := th.EW()
	lf, _ := math.Lgamma(float64(d.L() + 1))
	lfn, _ := math.Lgamma(float64(d.L() - n + 1))
	out := lf - lfn
	for _, y := range d.Values() {
		out += ew.LogProb(y)
	}
	return out + float64(d.L()-n)*ew.LogCDF(d.Values()[n-1])
}

// handCountLogPred is the beta-binomial predictive of model section 3,
// C(L, n) B(a0+A+n, b0+B+L-n) / B(a0+A, b0+B), from log-gamma functions.
func handCountLogPred(pr Prior, d *Datum, reported, considered int) float64 {
	a := pr.CountA + float64(reported)
	b := pr.CountB + float64(considered-reported)
	return logChooseInt(d.L(), d.N()) + lbeta(a+float64(d.N()), b+float64(d.L()-d.N())) - lbeta(a, b)
}

// handSegment is a segment as the hand computation sees it.
type handSegment struct {
	size, reported, considered int
	theta                      Theta
}

// handLogZ is log Z of Algorithm 8 for datum d: sum over segments of
// n_c f(d | theta_c, counts_c) plus (alpha/m) f(d | aux_j, no counts) for
// each auxiliary theta.
func handLogZ(pr Prior, d *Datum, segs []handSegment, aux []Theta, alpha float64) float64 {
	var terms []float64
	for _, g := range segs {
		terms = append(terms, math.Log(float64(g.size))+handValueLogLik(d, g.theta)+handCountLogPred(pr, d, g.reported, g.considered))
	}
	for _, th := range aux {
		terms = append(terms, math.Log(alpha/float64(len(aux)))+handValueLogLik(d, th)+handCountLogPred(pr, d, 0, 0))
	}
	return logSumExp(terms)
}

// handSystem returns a one-particle system holding products a, b, c, d of
// exactData with a hand-built state: {a, b} in segment A, {c} in B, {d}
// in C, alpha = 0.7.
func handSystem(t *testing.T) (*Particles, []Theta) {
	t.Helper()
	cfg := DefaultParticleConfig()
	cfg.Prior = exactPrior()
	cfg.Particles = 1
	ps, err := NewParticles(cfg, 41, 42)
	if err != nil {
		t.Fatal(err)
	}
	ps.Build() // an empty population: the adds below go into it one at a time
	data := exactData()
	for i := 0; i < 4; i++ {
		if _, err := ps.Add(exactID(i), *data[i]); err != nil {
			t.Fatal(err)
		}
	}
	th := []Theta{
		{LogA: math.Log(1.5), LogK: math.Log(2), LogS: math.Log(0.6)},
		{LogA: 0, LogK: math.Log(1.2), LogS: math.Log(0.1)},
		{LogA: math.Log(0.8), LogK: math.Log(0.9), LogS: math.Log(0.3)},
	}
	st := newState(&ps.prior, cfg.Aux, len(ps.slots), 0.7)
	st.data = ps.slots
	segA, segB, segC := st.newSegment(th[0]), st.newSegment(th[1]), st.newSegment(th[2])
	for slot, c := range []uint16{segA, segA, segB, segC} {
		st.join(slot, ps.slots[slot], c)
		st.n++
	}
	ps.parts[0].release()
	ps.parts[0] = st
	return ps, th
}

// TestAddIncrementHandAssembled checks the incremental weight of Add for
// P = 1 and a known state against Z / (N + alpha) assembled by hand from
// the state's segments and the auxiliary thetas the Add drew (left in the
// state's scratch). With one particle the returned log predictive is the
// increment itself. Tolerance 1e-12: the two sides differ only in the
// order of floating-point operations on terms of size ~10.
func TestAddIncrementHandAssembled(t *testing.T) {
	t.Parallel()
	ps, th := handSystem(t)
	pr := ps.prior
	d := exactData()
	segs := []handSegment{
		{2, d[0].N() + d[1].N(), 8, th[0]},
		{1, d[2].N(), 4, th[1]},
		{1, d[3].N(), 4, th[2]},
	}
	nd := MustDatum([]float64{0.3, 0.2}, 4)
	e0 := ps.LogEvidence()
	lp, err := ps.Add("e", nd)
	if err != nil {
		t.Fatal(err)
	}
	st := ps.parts[0]
	if len(st.aux) != ps.cfg.Aux {
		t.Fatalf("%d auxiliary thetas in scratch, want %d", len(st.aux), ps.cfg.Aux)
	}
	want := handLogZ(pr, &nd, segs, st.aux, 0.7) - math.Log(4+0.7)
	if math.Abs(lp-want) > 1e-12*math.Max(1, math.Abs(want)) {
		t.Errorf("Add: log increment %.15g, hand-assembled log Z/(N+alpha) = %.15g", lp, want)
	}
	if got := ps.LogEvidence() - e0; math.Abs(got-want) > 1e-12*math.Max(1, math.Abs(want)) {
		t.Errorf("Add moved LogEvidence by %.15g, want %.15g", got, want)
	}
}

// TestRemoveIncrementHandAssembled checks Remove's incremental weight
// (N - 1 + alpha) / Z(others, datum), as left in the increment scratch,
// for a product alone in its segment (whose theta must then be the first
// auxiliary theta, as Algorithm 8 requires) and for one that shares it.
// (LogEvidence moves by the forward predictive instead; see Remove.)
func TestRemoveIncrementHandAssembled(t *testing.T) {
	t.Parallel()
	ps, th := handSystem(t)
	pr := ps.prior
	d := exactData()
	st := ps.parts[0]

	if err := ps.Remove("c"); err != nil {
		t.Fatal(err)
	}
	if st.aux[0] != th[1] {
		t.Errorf("removing a singleton: first auxiliary theta %+v, want its segment's %+v", st.aux[0], th[1])
	}
	segs := []handSegment{
		{2, d[0].N() + d[1].N(), 8, th[0]},
		{1, d[3].N(), 4, th[2]},
	}
	want := math.Log(3+0.7) - handLogZ(pr, d[2], segs, st.aux, 0.7)
	if got := ps.incr[0]; math.Abs(got-want) > 1e-12*math.Max(1, math.Abs(want)) {
		t.Errorf("Remove(c): log increment %.15g, want %.15g", got, want)
	}

	if err := ps.Remove("a"); err != nil {
		t.Fatal(err)
	}
	segs = []handSegment{
		{1, d[1].N(), 4, th[0]},
		{1, d[3].N(), 4, th[2]},
	}
	want = math.Log(2+0.7) - handLogZ(pr, d[0], segs, st.aux, 0.7)
	if got := ps.incr[0]; math.Abs(got-want) > 1e-12*math.Max(1, math.Abs(want)) {
		t.Errorf("Remove(a): log increment %.15g, want %.15g", got, want)
	}
	if ps.Len() != 2 || st.n != 2 || st.numSegments() != 2 {
		t.Errorf("after two removes: %d products, state n %d, %d segments; want 2, 2, 2", ps.Len(), st.n, st.numSegments())
	}
}

// testWeightVectors returns normalised weight vectors of P entries: flat,
// one-hot, log-normal, with exact zeros (leading, inner, trailing), and a
// near-degenerate one.
func testWeightVectors(P int, src *rand.Rand) [][]float64 {
	norm := func(w []float64) []float64 {
		s := 0.0
		for _, v := range w {
			s += v
		}
		for i := range w {
			w[i] /= s
		}
		return w
	}
	var out [][]float64
	flat := make([]float64, P)
	for i := range flat {
		flat[i] = 1
	}
	out = append(out, norm(flat))
	hot := make([]float64, P)
	hot[P/3] = 1
	out = append(out, hot)
	for r := 0; r < 20; r++ {
		w := make([]float64, P)
		for i := range w {
			w[i] = math.Exp(2 * src.NormFloat64())
			if r%2 == 1 && src.Float64() < 0.4 {
				w[i] = 0
			}
		}
		if r%4 == 1 {
			w[0], w[P-1], w[P-2] = 0, 0, 0
		}
		out = append(out, norm(w))
	}
	peak := make([]float64, P)
	for i := range peak {
		peak[i] = 1e-12
	}
	peak[P-1] = 1
	out = append(out, norm(peak))
	return out
}

func ancestorCounts(anc []int, P int) []int {
	c := make([]int, P)
	for _, a := range anc {
		c[a]++
	}
	return c
}

// TestSystematicResample checks the defining property of systematic
// resampling: with cumulative weights C_j, index j receives the points
// (p + u)/P that fall in its interval, so its count is floor(P w_j) or
// ceil(P w_j) (an exact property, up to 1e-9 for rounding in the
// cumulative sums), never more than 0 for a zero weight, and the
// ancestors come out ascending.
func TestSystematicResample(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(51, 52))
	const P = 37
	us := []float64{0.5, 0.25, 1e-9, 1 - 1e-9}
	for k, w := range testWeightVectors(P, src) {
		for r := 0; r < 10; r++ {
			u := src.Float64()
			if r < len(us) {
				u = us[r]
			}
			anc := systematicResample(w, len(w), u)
			if len(anc) != P {
				t.Fatalf("vector %d: %d ancestors, want %d", k, len(anc), P)
			}
			for p := 1; p < P; p++ {
				if anc[p] < anc[p-1] {
					t.Fatalf("vector %d u=%v: ancestors not ascending at %d: %v", k, u, p, anc)
				}
			}
			for j, c := range ancestorCounts(anc, P) {
				pw := float64(P) * w[j]
				if w[j] == 0 && c > 0 {
					t.Errorf("vector %d u=%v: index %d has weight 0 but was drawn %d times", k, u, j, c)
				}
				if float64(c) < math.Floor(pw-1e-9) || float64(c) > math.Ceil(pw+1e-9) {
					t.Errorf("vector %d u=%v: index %d (weight %.3g) drawn %d times, P w = %.6f", k, u, j, w[j], c, pw)
				}
			}
		}
	}
}

// TestSystematicResampleZeroWeightEdges puts the uniform at the ends of
// its range [0, 1): u = 0 (Float64 returns it with probability 2^-53)
// and the largest double below 1. A particle of weight 0 (log weight
// -Inf: a state the target excludes) must never be drawn. At u = 0 the
// first point x = 0 is not greater than the cumulative weight 0 of a
// leading zero-weight particle, so that particle is kept; near u = 1 the
// last point exceeds the cumulative sum of the normalised weights, which
// falls short of 1 by a few ulps, and the walk runs on to a trailing
// zero-weight particle.
func TestSystematicResampleZeroWeightEdges(t *testing.T) {
	t.Parallel()
	const P = 37
	src := rand.New(rand.NewPCG(53, 54))
	for k, w := range testWeightVectors(P, src) {
		for _, u := range []float64{0, math.Nextafter(1, 0)} {
			for j, c := range ancestorCounts(systematicResample(w, len(w), u), P) {
				if w[j] == 0 && c > 0 {
					t.Errorf("vector %d u=%v: index %d has weight 0 but was drawn %d times", k, u, j, c)
				}
			}
		}
	}
}

// TestResidualResample checks residual resampling: P ascending ancestors,
// each index at least floor(P w_j) times, and E[count_j] = P w_j. The
// mean over R repetitions has standard error sqrt(m r_j (1 - r_j) / R),
// with m = P - sum floor(P w) multinomial draws over residual shares r_j;
// we allow 4.5 standard errors per index (for 37 indices the chance of a
// false alarm is about 2.5e-4).
func TestResidualResample(t *testing.T) {
	t.Parallel()
	R := 4000
	if testing.Short() {
		R = 1000
	}
	src := rand.New(rand.NewPCG(61, 62))
	const P = 37
	vecs := testWeightVectors(P, src)
	for _, k := range []int{0, 2, 3, len(vecs) - 1} {
		w := vecs[k]
		floors := make([]int, P)
		res := make([]float64, P)
		m, rsum := P, 0.0
		for j := range w {
			floors[j] = int(math.Floor(float64(P) * w[j]))
			m -= floors[j]
			res[j] = float64(P)*w[j] - float64(floors[j])
			rsum += res[j]
		}
		sum := make([]float64, P)
		for r := 0; r < R; r++ {
			anc := residualResample(w, len(w), src)
			if len(anc) != P {
				t.Fatalf("vector %d: %d ancestors, want %d", k, len(anc), P)
			}
			for p := 1; p < P; p++ {
				if anc[p] < anc[p-1] {
					t.Fatalf("vector %d: ancestors not ascending: %v", k, anc)
				}
			}
			for j, c := range ancestorCounts(anc, P) {
				if c < floors[j] {
					t.Fatalf("vector %d: index %d drawn %d times, below floor(P w) = %d", k, j, c, floors[j])
				}
				sum[j] += float64(c)
			}
		}
		for j := range w {
			mean := sum[j] / float64(R)
			rj := 0.0
			if rsum > 0 {
				rj = res[j] / rsum
			}
			se := math.Sqrt(float64(m) * rj * (1 - rj) / float64(R))
			if math.Abs(mean-float64(P)*w[j]) > 4.5*se+1e-9 {
				t.Errorf("vector %d index %d: mean count %.4f, P w = %.4f (se %.4f)", k, j, mean, float64(P)*w[j], se)
			}
		}
	}
}

// TestESS checks the effective sample size: P for equal weights (a new
// system, and after a resampling settle), and (sum w)^2 / sum w^2 for
// weights set by hand.
func TestESS(t *testing.T) {
	t.Parallel()
	cfg := DefaultParticleConfig()
	cfg.Particles = 100
	ps, err := NewParticles(cfg, 1, 2)
	if err != nil {
		t.Fatal(err)
	}
	ps.Build()
	if got := ps.ESS(); math.Abs(got-100) > 1e-9 {
		t.Errorf("ESS of equal weights = %v, want 100", got)
	}
	var s, s2 float64
	for p := range ps.logw {
		w := float64(p%7 + 1)
		ps.logw[p] = math.Log(w) - 30
		s += w
		s2 += w * w
	}
	if got, want := ps.ESS(), s*s/s2; math.Abs(got-want) > 1e-9*want {
		t.Errorf("ESS = %v, want %v", got, want)
	}
	ps.logw[3] = 50 // one particle carries all the weight
	if got := ps.ESS(); math.Abs(got-1) > 1e-9 {
		t.Errorf("ESS with one dominant weight = %v, want 1", got)
	}
	if !ps.Settle() {
		t.Fatal("Settle did not resample at ESS 1")
	}
	if got := ps.ESS(); math.Abs(got-100) > 1e-9 {
		t.Errorf("ESS after resampling = %v, want 100", got)
	}
	if got := ps.Diversity(); got != 1 {
		t.Errorf("Diversity after resampling one particle = %d, want 1", got)
	}
}

// TestDecodeRejectsInconsistentState encodes systems whose bookkeeping has
// been broken by hand in ways a corrupted byte can produce, and expects
// DecodeParticles to refuse them with ErrEncoding: the check that every
// accepted encoding is one the operations can continue from. Each case
// names what would go wrong later if it were accepted.
func TestDecodeRejectsInconsistentState(t *testing.T) {
	t.Parallel()
	build := func(t *testing.T) *Particles {
		t.Helper()
		cfg := DefaultParticleConfig()
		cfg.Prior = exactPrior()
		cfg.Particles = 8
		ps, err := NewParticles(cfg, 71, 72)
		if err != nil {
			t.Fatal(err)
		}
		for i, d := range exactData() {
			if _, err := ps.Add(exactID(i), *d); err != nil {
				t.Fatal(err)
			}
		}
		ps.SettleRefit()                       // builds the population
		if err := ps.Remove("b"); err != nil { // frees slot 1
			t.Fatal(err)
		}
		if _, err := DecodeParticles(ps.Encode(), 1); err != nil {
			t.Fatalf("untouched system does not decode: %v", err)
		}
		return ps
	}
	cases := []struct {
		name  string
		later string
		spoil func(ps *Particles)
	}{
		{"touched slot holds no product", "Settle reassigns a nil datum and panics",
			func(ps *Particles) { ps.touched = append(ps.touched, 1); ps.isTouch[1] = true }},
		{"free slot holds a product", "the next Add overwrites product a's slot",
			func(ps *Particles) { ps.free = append(ps.free, 0) }},
		{"free slot listed twice", "two Adds share one slot",
			func(ps *Particles) { ps.free = append(ps.free, 1) }},
		{"free segment is occupied", "the next new segment resets an occupied one",
			func(ps *Particles) {
				st := ps.parts[0]
				e := st.newSegment(Theta{})
				st.free = append(st.free, e) // consistent: one more empty segment
				st.free[len(st.free)-1] = st.label(0)
			}},
		{"segment theta not finite", "Settle's slice update of log a never terminates (its shrinkage loop compares NaNs)",
			func(ps *Particles) {
				st := ps.parts[0]
				c := st.label(0)
				th := st.segs[c].theta
				th.LogK = math.NaN() // one flipped exponent bit of a log parameter near 1 gives Inf or NaN
				st.segs[c].setTheta(th)
			}},
		{"log weight not a number", "ESS is NaN and the next increment turns every log weight NaN",
			func(ps *Particles) { ps.logw[2] = math.NaN() }},
		{"labels before the first build", "the build's chains start from states the population never had",
			func(ps *Particles) { ps.built = false }},
		{"placement record names a free segment", "a summary reads the kernel of a segment no product is in",
			func(ps *Particles) {
				ps.SettleRefit()
				sf := ps.soft[0]
				sf.Seg[0] = uint16(len(ps.parts[0].segs))
			}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			ps := build(t)
			c.spoil(ps)
			_, err := DecodeParticles(ps.Encode(), 1)
			if !errors.Is(err, ErrEncoding) {
				t.Errorf("DecodeParticles accepted it (err %v); later, %s", err, c.later)
			}
		})
	}
}

// FootprintForTest returns the bytes the particle system keeps, for the
// benchmarks of the external test package: labelBytes counts every
// distinct label buffer of the particle states once (2 bytes a slot, as
// shared buffers are shared in memory), segmentBytes the segment records
// and free-segment lists of every particle, keptBytes the placement
// records of the last waste-free step kept for the summaries.
// Test-only.
func (ps *Particles) FootprintForTest() (labelBytes, segmentBytes, keptBytes int) {
	seen := map[*labelBuf]bool{}
	for _, st := range ps.parts {
		if !seen[st.labels] {
			seen[st.labels] = true
			labelBytes += 2 * len(st.labels.l)
		}
		segmentBytes += len(st.segs)*int(unsafe.Sizeof(segment{})) + 2*len(st.free)
	}
	for _, sf := range ps.soft {
		if sf != nil {
			keptBytes += 4*len(sf.Off) + 2*len(sf.Seg) + 4*len(sf.P) + int(unsafe.Sizeof(Mover{}))*len(sf.Movers)
		}
	}
	return labelBytes, segmentBytes, keptBytes
}
