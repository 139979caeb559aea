package sequential

import (
	"fmt"
	"math"
)

// SegmentLogPredictive returns, for each product i and each point segment
// c of partition (0..k-1), the log posterior predictive density of
// data[i] as a member of segment c, mixed over the weighted draws.
//
// In draw d, segment c is represented by the draw segment j*(d, c) that
// holds most of c's other members (i itself left out; the lowest label on
// ties); the datum's density as a member of draw segment j is the
// beta-binomial predictive of its count given j's other members (p
// integrated out, model section 3) times the order-statistic density of
// its values under j's kernel (section 2). Then
//
//	out[i][c] = log sum_d w_d lik_d(data[i] | j*(d, c)).
//
// An earlier form mixed over every draw segment holding some of c's
// members, in proportion to their shares. A few uncertain members of c
// sitting elsewhere in some draws then gave c a floor of about their share
// times the density under another segment's kernel, which capped the
// contrast between well-separated segments near 1/share (a factor of
// 25-40 where the true kernels gave e^50 and more) and left the switch
// filter under-confident.
//
// When c holds product i alone, its "other members" are i itself: the
// draw segment i sits in. The kernels of a draw were fitted with data[i]
// among the data, so the density under i's own draw segment is slightly
// optimistic (by one member's share of the fit); the count part leaves i
// out exactly.
//
// Errors wrap ErrDraws or ErrDatum, as Summarize's, or ErrConfig for a
// partition that does not match the data or k.
func SegmentLogPredictive(draws []Draw, data []*Datum, partition []int, k int, prior Prior) ([][]float64, error) {
	if err := checkSummaryInput(draws, data); err != nil {
		return nil, err
	}
	if len(partition) != len(data) {
		return nil, fmt.Errorf("%w: partition has %d entries for %d products", ErrConfig, len(partition), len(data))
	}
	size := make([]int, k)
	for i, c := range partition {
		if c < 0 || c >= k {
			return nil, fmt.Errorf("%w: partition[%d] = %d, want 0..%d", ErrConfig, i, c, k-1)
		}
		size[c]++
	}
	w, err := normalizedWeights(draws)
	if err != nil {
		return nil, err
	}
	n := len(data)
	// acc[i][c] accumulates log sum_d w_d sum_j ..., by log-sum-exp.
	acc := make([][]float64, n)
	flat := make([]float64, n*k)
	for i := range acc {
		acc[i] = flat[i*k : (i+1)*k : (i+1)*k]
		for c := range acc[i] {
			acc[i][c] = math.Inf(-1)
		}
	}
	pa, pb := prior.CountA, prior.CountB
	var (
		segSize, rep, cons []int
		comp               []float64 // comp[c*J + j]: members of c labelled j
		lik                []float64
		kerns              []kernel
	)
	for d, dr := range draws {
		if w[d] <= 0 {
			continue
		}
		lw := math.Log(w[d])
		nj := len(dr.Segments)
		segSize = resetInts(segSize, nj)
		rep = resetInts(rep, nj)
		cons = resetInts(cons, nj)
		comp = comp[:0]
		for range k * nj {
			comp = append(comp, 0)
		}
		for i, l := range dr.Labels {
			segSize[l]++
			rep[l] += data[i].N()
			cons[l] += data[i].L()
			comp[partition[i]*nj+int(l)]++
		}
		kerns = kerns[:0]
		for _, t := range dr.Segments {
			kerns = append(kerns, t.kernel())
		}
		if cap(lik) < nj {
			lik = make([]float64, nj)
		}
		lik = lik[:nj]
		for i, di := range data {
			own := int(dr.Labels[i])
			// log density of di under every occupied draw segment.
			for j := 0; j < nj; j++ {
				if segSize[j] == 0 {
					lik[j] = math.Inf(-1)
					continue
				}
				r, cn := rep[j], cons[j]
				if j == own {
					r -= di.N()
					cn -= di.L()
				}
				lik[j] = di.CountLogPred(r, cn, pa, pb) + di.valueLogLik(&kerns[j])
			}
			ci := partition[i]
			for c := 0; c < k; c++ {
				others := float64(size[c])
				if c == ci {
					others--
				}
				jstar := own
				if others > 0 {
					row := comp[c*nj : (c+1)*nj]
					most := 0.0
					for j, cnt := range row {
						if j == own && c == ci {
							cnt--
						}
						if cnt > most {
							jstar, most = j, cnt
						}
					}
				}
				acc[i][c] = logAddExp(acc[i][c], lw+lik[jstar])
			}
		}
	}
	return acc, nil
}

// logAddExp returns log(exp(a) + exp(b)).
func logAddExp(a, b float64) float64 {
	if math.IsInf(a, -1) {
		return b
	}
	if math.IsInf(b, -1) {
		return a
	}
	if a < b {
		a, b = b, a
	}
	return a + math.Log1p(math.Exp(b-a))
}
