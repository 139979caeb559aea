package sequential

import (
	"math"
	"math/rand/v2"
	"sort"
)

// normalised returns exp(logw - max) / sum.
func normalised(logw []float64) []float64 {
	w := make([]float64, len(logw))
	mw := maxOf(logw)
	sum := 0.0
	for p, lw := range logw {
		w[p] = math.Exp(lw - mw)
		sum += w[p]
	}
	for p := range w {
		w[p] /= sum
	}
	return w
}

// ancestors draws n ancestor indices (ascending) from the normalised
// weights w by the scheme, with src.
func ancestors(scheme Resampler, w []float64, n int, src *rand.Rand) []int {
	if scheme == Residual {
		return residualResample(w, n, src)
	}
	return systematicResample(w, n, src.Float64())
}

// systematicResample returns n ancestor indices, ascending, for
// normalised weights w and one uniform u in [0, 1): the i-th is the
// index at which the cumulative weight first exceeds (i + u)/n.
func systematicResample(w []float64, n int, u float64) []int {
	P := len(w)
	anc := make([]int, n)
	// Only particles of positive weight may be drawn: the walk stops at
	// the last of them even when rounding leaves the cumulative sum a
	// little below the last point, and skips zero weights at the start.
	last := P - 1
	for last > 0 && w[last] == 0 {
		last--
	}
	j := 0
	for j < last && w[j] == 0 {
		j++
	}
	acc := w[j]
	for p := 0; p < n; p++ {
		x := (float64(p) + u) / float64(n)
		for (x >= acc || w[j] == 0) && j < last {
			j++
			acc += w[j]
		}
		anc[p] = j
	}
	return anc
}

// residualResample keeps floor(n w_j) copies of each j and draws the
// remaining ancestors multinomially from the residual weights.
func residualResample(w []float64, n int, src *rand.Rand) []int {
	P := len(w)
	anc := make([]int, 0, n)
	res := make([]float64, P)
	rsum := 0.0
	for j, wj := range w {
		c := int(math.Floor(float64(n) * wj))
		for k := 0; k < c; k++ {
			anc = append(anc, j)
		}
		res[j] = float64(n)*wj - float64(c)
		rsum += res[j]
	}
	for len(anc) < n {
		u := src.Float64() * rsum
		acc := 0.0
		j := 0
		for ; j < P-1; j++ {
			acc += res[j]
			if u < acc {
				break
			}
		}
		anc = append(anc, j)
	}
	sort.Ints(anc)
	return anc
}

// ESS returns the effective sample size 1 / sum(W^2) of the normalised
// weights, in [1, P].
func (ps *Particles) ESS() float64 { return essAfter(ps.logw, nil) }

// resample draws P ancestors by the configured scheme, resets the
// weights to equal and records the degeneracy it absorbed (the ESS share
// before it) for the next waste-free step.
func (ps *Particles) resample() {
	P := len(ps.parts)
	ps.logMoved += math.Log(ps.ESS() / float64(P))
	anc := ancestors(ps.cfg.Resampler, normalised(ps.logw), P, rand.New(ps.master))
	next := make([]*State, P)
	origin := make([]int, P)
	for p, a := range anc {
		next[p] = ps.parts[a].clone()
		origin[p] = ps.origin[a]
	}
	for _, st := range ps.parts {
		st.release()
	}
	ps.parts = next
	ps.origin = origin
	ps.resampledSince = true
	ps.soft = nil
	for p := range ps.logw {
		ps.logw[p] = 0
	}
}
