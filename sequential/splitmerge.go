package sequential

import (
	"math"
	"math/rand/v2"
)

// ratioTerm names one term of the split-merge Metropolis-Hastings ratio.
// The zero value keeps them all; tests drop one at a time to show that the
// exactness checks notice (a move that leaves a term out is not exact).
type ratioTerm uint8

const (
	keepAllTerms ratioTerm = iota
	dropPartDensities
	dropUnionDensity
	dropAllocation
	dropCountTerm
	dropCRPFactor
)

// MoveStats counts split-merge proposals and acceptances.
type MoveStats struct {
	SplitsProposed, SplitsAccepted, MergesProposed, MergesAccepted uint64
}

// Add returns the sum of two counts.
func (m MoveStats) Add(o MoveStats) MoveStats {
	return MoveStats{m.SplitsProposed + o.SplitsProposed, m.SplitsAccepted + o.SplitsAccepted,
		m.MergesProposed + o.MergesProposed, m.MergesAccepted + o.MergesAccepted}
}

// provisionalSteps is the number of Newton steps of each provisional
// kernel fit that guides the allocation (after the anchors' first fits,
// which take up to newtonSteps from the prior mean): refits start from
// the previous fit each time a part doubles, up to fitSubset members.
const provisionalSteps = 1

// smScratch holds the split-merge move's working lists.
type smScratch struct {
	rest, p1, p2, union []int
}

// randomPresent returns a uniformly chosen present slot (s.n >= 1).
func (s *State) randomPresent(src *rand.Rand) int {
	for {
		i := src.IntN(len(s.data))
		if s.data[i] != nil {
			return i
		}
	}
}

// splitMerge makes one split-merge proposal (package doc, "Split-merge
// move") and applies it if accepted. It leaves the posterior invariant.
func (s *State) splitMerge(src *rand.Rand) (split, accepted bool) {
	if s.n < 2 {
		return false, false
	}
	i := s.randomPresent(src)
	j := s.randomPresent(src)
	for j == i {
		j = s.randomPresent(src)
	}
	ci, cj := s.label(i), s.label(j)
	sc := &s.sm
	sc.rest = sc.rest[:0]
	for k, c := range s.labels.l {
		if k != i && k != j && (c == ci || c == cj) {
			sc.rest = append(sc.rest, k)
		}
	}
	src.Shuffle(len(sc.rest), func(a, b int) { sc.rest[a], sc.rest[b] = sc.rest[b], sc.rest[a] })
	sc.union = append(append(sc.union[:0], i, j), sc.rest...)
	if ci == cj {
		return true, s.trySplit(i, j, ci, src)
	}
	return false, s.tryMerge(i, j, ci, cj, src)
}

// allocate distributes sc.rest, in its order, between part 1 (anchor i)
// and part 2 (anchor j) into sc.p1 and sc.p2. Each product goes to a part
// with probability proportional to the part's size times its
// beta-binomial count term and its value likelihood under the part's
// provisional kernel, a Laplace fit (from the prior mean) to the part's
// members so far, refitted whenever the part doubles. With inPart1 nil
// the parts are drawn; otherwise inPart1 says where each product goes and
// only the probability of that allocation is computed, as the reverse of
// a merge needs. It returns the log probability of the allocation and the
// final provisional kernels.
func (s *State) allocate(i, j int, inPart1 func(int) bool, src *rand.Rand) (logP float64, t1, t2 Theta) {
	sc := &s.sm
	pr := s.prior
	pa, pb := pr.CountA, pr.CountB
	data := s.data
	mean := Theta{pr.LogA.Mu, pr.LogK.Mu, pr.LogS.Mu}
	sc.p1 = append(sc.p1[:0], i)
	sc.p2 = append(sc.p2[:0], j)
	type part struct {
		mem       *[]int
		rep, cons int
		th        Theta
		kern      kernel
		refitAt   int
	}
	fit := func(p *part) {
		steps := provisionalSteps
		if p.refitAt == 1 {
			steps = newtonSteps
		}
		p.th = provisionalKernel(pr, data, *p.mem, p.th, steps)
		p.kern = p.th.kernel()
		p.refitAt *= 2
	}
	parts := [2]part{
		{mem: &sc.p1, rep: data[i].N(), cons: data[i].L(), th: mean, refitAt: 1},
		{mem: &sc.p2, rep: data[j].N(), cons: data[j].L(), th: mean, refitAt: 1},
	}
	fit(&parts[0])
	fit(&parts[1])
	for _, k := range sc.rest {
		d := data[k]
		var lw [2]float64
		for x := range parts {
			p := &parts[x]
			lw[x] = d.sizeCountLogPred(len(*p.mem), p.rep, p.cons, pa, pb) + d.valueLogLik(&p.kern)
		}
		// log P(part 1) = -log(1 + e^(lw2 - lw1)), and the same for 2.
		l1 := -log1pExp(lw[1] - lw[0])
		l2 := -log1pExp(lw[0] - lw[1])
		var to int
		if inPart1 != nil {
			if !inPart1(k) {
				to = 1
			}
		} else if src.Float64() >= math.Exp(l1) {
			to = 1
		}
		if to == 0 {
			logP += l1
		} else {
			logP += l2
		}
		p := &parts[to]
		*p.mem = append(*p.mem, k)
		p.rep += d.N()
		p.cons += d.L()
		if len(*p.mem) >= 2*p.refitAt && p.refitAt <= fitSubset {
			fit(p)
		}
	}
	return logP, parts[0].th, parts[1].th
}

// blockCountLogLik returns the log marginal probability of the members'
// counts as one segment with p integrated out, without the C(L, n)
// factors (they are the same for any partition): log B(pa + A, pb + B) -
// log B(pa, pb) with A and B the reported and unreported totals.
func blockCountLogLik(pr *Prior, data []*Datum, mem []int) float64 {
	var a, b int
	for _, i := range mem {
		a += data[i].N()
		b += data[i].L() - data[i].N()
	}
	return lbeta(pr.CountA+float64(a), pr.CountB+float64(b)) - lbeta(pr.CountA, pr.CountB)
}

// valueSum returns the members' summed value log densities under th.
func valueSum(data []*Datum, mem []int, th Theta) float64 {
	kn := th.kernel()
	var s float64
	for _, i := range mem {
		s += data[i].valueLogLik(&kn)
	}
	return s
}

// splitLogRatio returns the log Metropolis-Hastings ratio of splitting the
// union of sc.p1 and sc.p2, whose one segment has kernel tu, into the two
// parts with kernels t1 and t2; the ratio of the reverse merge is its
// negative. The proposal terms are the allocation's log probability and
// the log densities of the part proposals at t1, t2 and of the union's at
// tu.
func (s *State) splitLogRatio(t1, t2, tu Theta, logAlloc, logQ1, logQ2, logQU float64) float64 {
	sc := &s.sm
	pr := s.prior
	n1, n2 := float64(len(sc.p1)), float64(len(sc.p2))
	lg1, _ := math.Lgamma(n1)
	lg2, _ := math.Lgamma(n2)
	lgu, _ := math.Lgamma(n1 + n2)
	var r float64
	if s.drop != dropCRPFactor {
		r += math.Log(s.alpha) + lg1 + lg2 - lgu
	}
	if s.drop != dropCountTerm {
		r += blockCountLogLik(pr, s.data, sc.p1) + blockCountLogLik(pr, s.data, sc.p2) - blockCountLogLik(pr, s.data, sc.union)
	}
	r += pr.LogBase(t1) + pr.LogBase(t2) - pr.LogBase(tu)
	r += valueSum(s.data, sc.p1, t1) + valueSum(s.data, sc.p2, t2) - valueSum(s.data, sc.union, tu)
	if s.drop != dropAllocation {
		r -= logAlloc
	}
	if s.drop != dropPartDensities {
		r -= logQ1 + logQ2
	}
	if s.drop != dropUnionDensity {
		r += logQU
	}
	return r
}

// unionStart is where the union's kernel fit starts: the kernel of the
// larger part (part 1 on a tie). Both directions of the move see the
// same split state, so both compute the same union proposal.
func (s *State) unionStart(t1, t2 Theta) Theta {
	if len(s.sm.p2) > len(s.sm.p1) {
		return t2
	}
	return t1
}

// trySplit proposes splitting segment c, which holds anchors i and j.
func (s *State) trySplit(i, j int, c uint16, src *rand.Rand) bool {
	sc := &s.sm
	logAlloc, f1, f2 := s.allocate(i, j, nil, src)
	q1 := fitKernel(s.prior, s.data, sc.p1, f1, newtonSteps)
	q2 := fitKernel(s.prior, s.data, sc.p2, f2, newtonSteps)
	t1, t2 := q1.draw(src), q2.draw(src)
	qu := fitKernel(s.prior, s.data, sc.union, s.unionStart(t1, t2), newtonSteps)
	tu := s.segs[c].theta
	r := s.splitLogRatio(t1, t2, tu, logAlloc, q1.logDensity(t1), q2.logDensity(t2), qu.logDensity(tu))
	if !(math.Log(src.Float64()) < r) {
		return false
	}
	c2 := s.newSegment(t2)
	for _, k := range sc.p2 {
		d := s.data[k]
		g := &s.segs[c]
		g.size--
		g.reported -= d.N()
		g.considered -= d.L()
		s.join(k, d, c2)
	}
	s.segs[c].setTheta(t1)
	return true
}

// tryMerge proposes merging segments ci (holding anchor i) and cj
// (holding anchor j).
func (s *State) tryMerge(i, j int, ci, cj uint16, src *rand.Rand) bool {
	sc := &s.sm
	logAlloc, f1, f2 := s.allocate(i, j, func(k int) bool { return s.label(k) == ci }, src)
	t1, t2 := s.segs[ci].theta, s.segs[cj].theta
	q1 := fitKernel(s.prior, s.data, sc.p1, f1, newtonSteps)
	q2 := fitKernel(s.prior, s.data, sc.p2, f2, newtonSteps)
	qu := fitKernel(s.prior, s.data, sc.union, s.unionStart(t1, t2), newtonSteps)
	tu := qu.draw(src)
	r := -s.splitLogRatio(t1, t2, tu, logAlloc, q1.logDensity(t1), q2.logDensity(t2), qu.logDensity(tu))
	if !(math.Log(src.Float64()) < r) {
		return false
	}
	for _, k := range sc.p2 {
		d := s.data[k]
		s.leave(k, d)
		s.join(k, d, ci)
	}
	s.segs[ci].setTheta(tu)
	return true
}

// splitMergeMoves makes the number of split-merge proposals a sweep
// calls for, rate per sweep: floor(rate), plus one more with probability
// rate - floor(rate). The number depends on nothing in the state.
func (s *State) splitMergeMoves(rate float64, src *rand.Rand) MoveStats {
	var st MoveStats
	if rate <= 0 {
		return st
	}
	k := int(rate)
	if src.Float64() < rate-float64(k) {
		k++
	}
	for ; k > 0; k-- {
		split, ok := s.splitMerge(src)
		switch {
		case split:
			st.SplitsProposed++
			if ok {
				st.SplitsAccepted++
			}
		default:
			st.MergesProposed++
			if ok {
				st.MergesAccepted++
			}
		}
	}
	return st
}
