package sequential

import (
	"math"
	"math/rand/v2"
)

// This file fits, for a set of products, the conditional posterior of one
// segment's kernel parameters (log a, log k, log s) given that the
// products form the segment, G0(theta) times their value likelihoods, by
// a Laplace approximation, and turns the fit into a multivariate-t
// independence proposal. The split-merge move (splitmerge.go) draws the
// kernels of the segments it proposes from these proposals.

// valueDerivs adds to ll, g and h the datum's value log density
// (valueLogLik) at theta = (u, v, w) = (log a, log k, log s) and its
// gradient and Hessian in those coordinates; h holds the upper triangle
// (uu, uv, uw, vv, vw, ww). With a = e^u, k = e^v, x_m = log y_m - w,
// t_m = k x_m, z_m = e^t_m and phi_m = log(1 - e^-z_m):
//
//	ll = log(L!/(L-n)!) + n(u + v - w) + (k-1) sum x - sum z + sum c_m phi_m
//
// with c_m = a - 1, plus (L-n) a for the last value, whose F(y_n)^(L-n)
// factor carries the unreported candidates. Writing r = dphi/dt =
// z/(e^z - 1) and q = d2phi/dt2 = r (1 - z (1 + 1/(e^z - 1))), and
// c'_m = dc_m/du (a, plus (L-n) a for the last value):
//
//	d/du  = n + sum c' phi
//	d/dv  = n + k sum x - sum z t + sum c r t
//	d/dw  = -k n + k sum z - k sum c r
//	d2/du2  = sum c' phi        d2/dudv = sum c' r t      d2/dudw = -k sum c' r
//	d2/dv2  = k sum x - sum z t (t+1) + sum c (q t^2 + r t)
//	d2/dvdw = -k n + k sum z (t+1) - k sum c (q t + r)
//	d2/dw2  = -k^2 sum z + k^2 sum c q
//
// (dt/dv = t, dt/dw = -k, dz = z dt.) The test checks every entry
// against finite differences of valueLogLik.
func (d *Datum) valueDerivs(u, v, w float64, ll *float64, g *[3]float64, h *[6]float64) {
	n := len(d.logY)
	if n == 0 {
		return
	}
	a, k := expFast(u), expFast(v)
	// Per value, with b = 1 + (a-1) r and e the extra (L-n) a of the last
	// value (0 for the others), so that c = a - 1 + e and k x = t:
	//
	//	ll_m  = (k-1) x + (a-1) phi + e phi
	//	dv_m  = 1 + t b - z t + e r t
	//	dw_m  = -k b + k z - k e r
	//	dvv_m = t b + e r t - z t (t+1) + c q t^2
	//	dvw_m = -k b - k e r + k z (t+1) - k c q t
	//
	// Where t < -30, phi = t - z/2 and r = 1 - z/2 to within 1e-13, so
	// (k-1) x + (a-1) phi = (ak - 1) x - (a-1) z/2 and b = a - (a-1) z/2
	// exactly in that approximation: written so, nothing cancels however
	// large k is (see valueLogLik).
	//
	// phi = log(1 - e^-z) = log(e^z - 1) - z from the same expm1 that
	// gives r: three table-driven transcendental calls per value
	// (fastmath.go). For large z the difference loses digits relative to
	// phi, not to the sum: its absolute error is about eps z.
	var du, dv, dw, huu, huv, huw, hvv, hvw, hww float64
	for m, ly := range d.logY {
		x := ly - w
		t := k * x
		z := expFast(t)
		var phi, r, q, b, lm float64
		switch {
		case t < -30:
			phi, r, q = t-0.5*z, 1-0.5*z, -0.5*z
			b = a - (a-1)*0.5*z
			lm = (a*k-1)*x - (a-1)*0.5*z
		case z > 700:
			phi, r, q = 0, 0, 0
			b = 1
			lm = (k - 1) * x
		default:
			em := expm1Fast(z)
			hz := 1 / em
			phi = logFast(em) - z
			r = z * hz
			q = r * (1 - z*(1+hz))
			b = 1 + (a-1)*r
			lm = (k-1)*x + (a-1)*phi
		}
		var e float64
		if m == n-1 {
			e = float64(d.l-n) * a
		}
		c, cp := a-1+e, a+e
		*ll += lm - z + e*phi
		du += 1 + cp*phi
		dv += 1 + t*b - z*t + e*r*t
		dw += -k*b + k*z - k*e*r
		huu += cp * phi
		huv += cp * r * t
		huw += -k * cp * r
		hvv += t*b + e*r*t - z*t*(t+1) + c*q*t*t
		hvw += -k*b - k*e*r + k*z*(t+1) - k*c*q*t
		hww += -k*k*z + k*k*c*q
	}
	*ll += d.logFall + float64(n)*(u+v-w)
	g[0] += du
	g[1] += dv
	g[2] += dw
	h[0] += huu
	h[1] += huv
	h[2] += huw
	h[3] += hvv
	h[4] += hvw
	h[5] += hww
}

// kernelPosterior evaluates the log conditional posterior of a segment's
// kernel, log G0(theta) + sum over members of the value log density,
// with its gradient and Hessian (upper triangle, as valueDerivs).
func kernelPosterior(pr *Prior, data []*Datum, mem []int, th Theta) (ll float64, g [3]float64, h [6]float64) {
	ll = pr.LogBase(th)
	for j, nm := range [3]Normal{pr.LogA, pr.LogK, pr.LogS} {
		x := [3]float64{th.LogA, th.LogK, th.LogS}[j]
		s2 := nm.Sigma * nm.Sigma
		g[j] = -(x - nm.Mu) / s2
		h[[3]int{0, 3, 5}[j]] = -1 / s2
	}
	for _, i := range mem {
		data[i].valueDerivs(th.LogA, th.LogK, th.LogS, &ll, &g, &h)
	}
	return ll, g, h
}

// sym3 is a symmetric 3 x 3 matrix stored as its upper triangle
// (00, 01, 02, 11, 12, 22).
type sym3 [6]float64

func (m sym3) at(i, j int) float64 {
	if i > j {
		i, j = j, i
	}
	return m[[3][3]int{{0, 1, 2}, {1, 3, 4}, {2, 4, 5}}[i][j]]
}

// chol3 returns the lower Cholesky factor of m and whether m is
// positive definite.
func chol3(m sym3) (l [3][3]float64, ok bool) {
	for i := 0; i < 3; i++ {
		for j := 0; j <= i; j++ {
			s := m.at(i, j)
			for k := 0; k < j; k++ {
				s -= l[i][k] * l[j][k]
			}
			if i == j {
				if !(s > 0) || math.IsInf(s, 0) {
					return l, false
				}
				l[i][i] = math.Sqrt(s)
			} else {
				l[i][j] = s / l[j][j]
			}
		}
	}
	return l, true
}

// cholSolve solves (L L^T) x = b.
func cholSolve(l [3][3]float64, b [3]float64) [3]float64 {
	var y, x [3]float64
	for i := 0; i < 3; i++ {
		s := b[i]
		for k := 0; k < i; k++ {
			s -= l[i][k] * y[k]
		}
		y[i] = s / l[i][i]
	}
	for i := 2; i >= 0; i-- {
		s := y[i]
		for k := i + 1; k < 3; k++ {
			s -= l[k][i] * x[k]
		}
		x[i] = s / l[i][i]
	}
	return x
}

// kernelProposal is a multivariate-t law on (log a, log k, log s): centre
// mu, scale matrix Sigma = (R R^T)^-1 with R the lower Cholesky factor of
// the precision, and df degrees of freedom.
type kernelProposal struct {
	mu   [3]float64
	prec [3][3]float64 // lower Cholesky factor R of the precision
	// logNorm is the log normalising constant: log Gamma((df+3)/2) -
	// log Gamma(df/2) - (3/2) log(df pi) + log det R.
	logNorm float64
}

// proposalDF is the degrees of freedom of the kernel proposals: heavier
// tails than the normal Laplace approximation, so that a conditional
// posterior that is skewed or wider than its curvature at the mode says
// still gets proposals in its tails (a multivariate t with a few degrees
// of freedom is the usual robust choice for independence proposals;
// common practice).
const proposalDF = 5

// newtonSteps bounds the Newton iterations of a kernel fit; fits start
// near the mode (a provisional fit, or a segment's current kernel), and
// three or four steps reach it to well within the proposal's scale.
const newtonSteps = 6

// fitDecrement ends a kernel fit's Newton ascent: the Newton decrement
// g^T (-H)^-1 g is twice the gain a full step would make on the
// quadratic model, and below 1e-4 the centre is within about 0.01
// standard deviations of the mode, far inside the proposal's scale.
const fitDecrement = 1e-4

// fitSubset is the number of members on which a kernel fit takes its
// first Newton steps: the log likelihood of the first fitSubset members
// (in the order given), scaled up to the whole set, stands in for the
// whole set's until the fit is close, so that a fit to a segment of a
// thousand products costs about two passes over them rather than five or
// six. Which members form the subset is a function of the member order,
// which both directions of the split-merge move share.
const fitSubset = 32

// fitKernel returns the Laplace approximation of the kernel's conditional
// posterior given the members, as a multivariate-t proposal: Newton
// ascent from start, at most maxIter steps, and the centre and curvature
// at the last point. Above fitSubset members the ascent first runs on the
// scaled subset, so that the steps on all the members start close to the
// mode (usually one or two of them then reach it). It is a deterministic
// function of (members in order, start, maxIter), which the split-merge
// ratio relies on: the reverse move recomputes the same fit.
//
// Stopping after a single step on all the members from the subset's
// optimum halved the cost of a proposal, but left the centre up to three
// standard deviations from the mode of a 200-product segment (the
// posterior of (log a, log k) is far from quadratic), and fewer
// proposals were accepted.
func fitKernel(pr *Prior, data []*Datum, mem []int, start Theta, maxIter int) kernelProposal {
	if len(mem) > fitSubset {
		start, _, _, _ = newtonAscent(pr, data, mem[:fitSubset], float64(len(mem))/fitSubset, start, maxIter)
	}
	th, f, _, h := newtonAscent(pr, data, mem, 1, start, maxIter)
	return proposalAt(pr, th, h, finite(f))
}

// positiveDefinite returns the Cholesky factor of m, with a ridge added
// to the diagonal (from 1e-3 up, tenfold) until m is positive definite;
// false if even a ridge of 1e8 does not make it so.
func positiveDefinite(m sym3) ([3][3]float64, bool) {
	l, ok := chol3(m)
	for ridge := 1e-3; !ok && ridge < 1e8; ridge *= 10 {
		r := m
		r[0] += ridge
		r[3] += ridge
		r[5] += ridge
		l, ok = chol3(r)
	}
	return l, ok
}

// provisionalKernel returns the centre of a quick fit to the members:
// Newton steps from start on at most the first fitSubset of them, their
// log likelihood scaled up to the whole set.
func provisionalKernel(pr *Prior, data []*Datum, mem []int, start Theta, steps int) Theta {
	sub := mem[:min(len(mem), fitSubset)]
	th, _, _, _ := newtonAscent(pr, data, sub, float64(len(mem))/float64(len(sub)), start, steps)
	return th
}

// newtonAscent maximises log G0(theta) + scale * (sum of the members'
// value log densities) by Newton steps from start (a step halved until
// the objective rises, with a ridge added to the negative Hessian until it
// is positive definite), at most maxIter steps, stopping once the Newton
// decrement is below fitDecrement. It returns the last point with the
// objective, gradient and Hessian there.
func newtonAscent(pr *Prior, data []*Datum, mem []int, scale float64, start Theta, maxIter int) (Theta, float64, [3]float64, [6]float64) {
	eval := func(th Theta) (float64, [3]float64, [6]float64) {
		if scale == 1 {
			return kernelPosterior(pr, data, mem, th)
		}
		// G0's part is exact; only the members' part is scaled.
		f0, g0, h0 := kernelPosterior(pr, data, nil, th)
		f, g, h := kernelPosterior(pr, data, mem, th)
		f = f0 + scale*(f-f0)
		for j := range g {
			g[j] = g0[j] + scale*(g[j]-g0[j])
		}
		for j := range h {
			h[j] = h0[j] + scale*(h[j]-h0[j])
		}
		return f, g, h
	}
	th := start
	f, g, h := eval(th)
	for it := 0; it < maxIter && finite(f); it++ {
		l, ok := positiveDefinite(sym3{-h[0], -h[1], -h[2], -h[3], -h[4], -h[5]})
		if !ok {
			break
		}
		step := cholSolve(l, g)
		if step[0]*g[0]+step[1]*g[1]+step[2]*g[2] < fitDecrement {
			break
		}
		moved := false
		for half := 0; half < 20; half++ {
			cand := Theta{th.LogA + step[0], th.LogK + step[1], th.LogS + step[2]}
			fc, gc, hc := eval(cand)
			if fc >= f {
				th, f, g, h = cand, fc, gc, hc
				moved = true
				break
			}
			for j := range step {
				step[j] /= 2
			}
		}
		if !moved {
			break
		}
	}
	return th, f, g, h
}

// proposalAt builds the t proposal centred at th with precision -h (a
// ridge added until it is positive definite), or the base measure's
// shape around the prior mean when the fit failed.
func proposalAt(pr *Prior, th Theta, h [6]float64, ok bool) kernelProposal {
	neg := sym3{-h[0], -h[1], -h[2], -h[3], -h[4], -h[5]}
	l, pd := chol3(neg)
	for ridge := 1e-6; ok && !pd && ridge < 1e8; ridge *= 10 {
		r := neg
		r[0] += ridge
		r[3] += ridge
		r[5] += ridge
		l, pd = chol3(r)
	}
	if !ok || !pd || !finite(th.LogA) || !finite(th.LogK) || !finite(th.LogS) {
		th = Theta{pr.LogA.Mu, pr.LogK.Mu, pr.LogS.Mu}
		l = [3][3]float64{{1 / pr.LogA.Sigma}, {0, 1 / pr.LogK.Sigma}, {0, 0, 1 / pr.LogS.Sigma}}
	}
	kp := kernelProposal{mu: [3]float64{th.LogA, th.LogK, th.LogS}, prec: l}
	df := float64(proposalDF)
	lg1, _ := math.Lgamma((df + 3) / 2)
	lg2, _ := math.Lgamma(df / 2)
	kp.logNorm = lg1 - lg2 - 1.5*math.Log(df*math.Pi) + math.Log(l[0][0]) + math.Log(l[1][1]) + math.Log(l[2][2])
	return kp
}

// logDensity returns the proposal's log density at th.
func (kp *kernelProposal) logDensity(th Theta) float64 {
	// With precision R R^T, the Mahalanobis form is |R^T (th - mu)|^2.
	d := [3]float64{th.LogA - kp.mu[0], th.LogK - kp.mu[1], th.LogS - kp.mu[2]}
	var q float64
	for j := 0; j < 3; j++ {
		var s float64
		for i := j; i < 3; i++ {
			s += kp.prec[i][j] * d[i]
		}
		q += s * s
	}
	df := float64(proposalDF)
	return kp.logNorm - (df+3)/2*math.Log1p(q/df)
}

// draw returns one draw: mu + R^-T z / sqrt(W/df) with z standard normal
// and W chi-squared with df degrees of freedom.
func (kp *kernelProposal) draw(src *rand.Rand) Theta {
	z := [3]float64{src.NormFloat64(), src.NormFloat64(), src.NormFloat64()}
	// Solve R^T x = z (R lower, so R^T upper): back substitution.
	var x [3]float64
	for i := 2; i >= 0; i-- {
		s := z[i]
		for k := i + 1; k < 3; k++ {
			s -= kp.prec[k][i] * x[k]
		}
		x[i] = s / kp.prec[i][i]
	}
	df := float64(proposalDF)
	scale := math.Sqrt(df / (2 * gammaRand(src, df/2)))
	return Theta{kp.mu[0] + scale*x[0], kp.mu[1] + scale*x[1], kp.mu[2] + scale*x[2]}
}
