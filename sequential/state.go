package sequential

import (
	"math"
	"math/rand/v2"
	"sync/atomic"
)

// Absent marks a product slot that holds no datum in a State (never
// added, or removed).
const Absent = math.MaxUint16

// MaxSegments is the largest number of segments a State can hold at once
// (labels are uint16 and Absent is reserved).
const MaxSegments = math.MaxUint16 - 1

// segment is one occupied (or free) mixture component of a State.
type segment struct {
	theta Theta
	kern  kernel
	// memo is shared by the copies of this segment that resampling makes,
	// until one of them sets a new theta: a change of data scores the
	// datum once per distinct kernel (Particles.memoValues).
	memo *kernelMemo
	size int
	// reported and considered are the count totals A = sum n_j and
	// A + B = sum L_j of the members; p is integrated out against them.
	reported, considered int
}

func (s *segment) setTheta(t Theta) {
	s.theta = t
	s.kern = t.kernel()
	s.memo = &kernelMemo{kern: s.kern}
}

// kernelMemo holds one kernel's value log densities of the data of the
// operation numbered op (see Particles.memoValues).
type kernelMemo struct {
	kern kernel
	op   uint64
	v    [2]float64
}

// labelBuf is a copy-on-write assignment vector shared between states
// after resampling; refs counts the states that point at it.
type labelBuf struct {
	l    []uint16
	refs atomic.Int32
}

// State is one configuration of the Dirichlet process mixture: the segment
// of every product slot, the kernel parameters of every occupied segment
// and the concentration alpha. It is the unit the batch sampler moves and
// the body of one particle. A State is not safe for concurrent use; two
// States may share label storage, which is copied on first write.
type State struct {
	data   []*Datum // shared, read-only; data[i] nil when slot i is absent
	labels *labelBuf
	segs   []segment
	free   []uint16 // indices of segs with size 0, reused before growing
	n      int      // number of present products
	alpha  float64
	prior  *Prior
	m      int // auxiliary segments per reassignment (Algorithm 8)

	// scratch for reassign, reused across calls: the Algorithm-8 terms
	// (logw), exp(logw - max) and their sum (prob, probSum), the candidate
	// segments, and the auxiliary thetas with their kernels.
	logw    []float64
	prob    []float64
	probSum float64
	cand    []uint16
	aux     []Theta
	auxKern []kernel

	// sm is the split-merge move's scratch; drop leaves one term out of
	// its ratio (tests only; the zero value keeps every term).
	sm   smScratch
	drop ratioTerm
}

// newState returns an empty state over data slots (all absent).
func newState(prior *Prior, m int, slots int, alpha float64) *State {
	lb := &labelBuf{l: make([]uint16, slots)}
	lb.refs.Store(1)
	for i := range lb.l {
		lb.l[i] = Absent
	}
	return &State{data: make([]*Datum, slots), labels: lb, alpha: alpha, prior: prior, m: m}
}

// clone returns a state sharing label storage with s (copy on write).
func (s *State) clone() *State {
	c := &State{
		data:   s.data,
		labels: s.labels,
		segs:   append([]segment(nil), s.segs...),
		free:   append([]uint16(nil), s.free...),
		n:      s.n,
		alpha:  s.alpha,
		prior:  s.prior,
		m:      s.m,
		drop:   s.drop,
	}
	s.labels.refs.Add(1)
	return c
}

// release drops this state's reference to its label storage.
func (s *State) release() { s.labels.refs.Add(-1) }

// ownLabels makes the label storage private before a write.
func (s *State) ownLabels() []uint16 {
	if s.labels.refs.Load() > 1 {
		nb := &labelBuf{l: append([]uint16(nil), s.labels.l...)}
		nb.refs.Store(1)
		s.labels.refs.Add(-1)
		s.labels = nb
	}
	return s.labels.l
}

func (s *State) label(i int) uint16 { return s.labels.l[i] }

func (s *State) setLabel(i int, c uint16) { s.ownLabels()[i] = c }

// numSegments returns the number of occupied segments.
func (s *State) numSegments() int { return len(s.segs) - len(s.free) }

// newSegment returns the index of an empty segment holding t.
func (s *State) newSegment(t Theta) uint16 {
	var c uint16
	if k := len(s.free); k > 0 {
		c = s.free[k-1]
		s.free = s.free[:k-1]
	} else {
		if len(s.segs) >= MaxSegments {
			panic("sequential: too many segments")
		}
		s.segs = append(s.segs, segment{})
		c = uint16(len(s.segs) - 1)
	}
	s.segs[c] = segment{}
	s.segs[c].setTheta(t)
	return c
}

// join puts slot i, holding datum d and in no segment, into segment c.
func (s *State) join(i int, d *Datum, c uint16) {
	g := &s.segs[c]
	g.size++
	g.reported += d.N()
	g.considered += d.L()
	s.setLabel(i, c)
}

// leave takes slot i, holding datum d, out of its segment and returns
// that segment and whether it is now empty (its index is then on the free
// list, with its theta still readable until reused).
func (s *State) leave(i int, d *Datum) (c uint16, emptied bool) {
	c = s.label(i)
	g := &s.segs[c]
	g.size--
	g.reported -= d.N()
	g.considered -= d.L()
	s.setLabel(i, Absent)
	if g.size == 0 {
		s.free = append(s.free, c)
		return c, true
	}
	return c, false
}

// predictiveTerms fills s.logw and s.cand with the Algorithm-8 terms for
// placing datum d (currently in no segment): for each occupied segment c,
// log n_c + log f(d | theta_c, count stats of c); then for each of the m
// auxiliary thetas in s.aux, log(alpha/m) + log f(d | aux, empty counts).
// The candidate label of an auxiliary term is Absent. It returns the log
// of the sum of the terms.
func (s *State) predictiveTerms(d *Datum) float64 { return s.terms(d, -1) }

// predictiveTermsMemo is predictiveTerms with each occupied segment's
// value log density read from its memo slot j, filled for d by
// Particles.memoValues; the auxiliaries are scored as usual.
func (s *State) predictiveTermsMemo(d *Datum, j int) float64 { return s.terms(d, j) }

func (s *State) terms(d *Datum, memo int) float64 {
	s.logw = s.logw[:0]
	s.cand = s.cand[:0]
	pa, pb := s.prior.CountA, s.prior.CountB
	maxw := math.Inf(-1)
	for c := range s.segs {
		g := &s.segs[c]
		if g.size == 0 {
			continue
		}
		var v float64
		if memo >= 0 {
			v = g.memo.v[memo]
		} else {
			v = d.valueLogLik(&g.kern)
		}
		w := d.sizeCountLogPred(g.size, g.reported, g.considered, pa, pb) + v
		s.logw = append(s.logw, w)
		s.cand = append(s.cand, uint16(c))
		if w > maxw {
			maxw = w
		}
	}
	if len(s.aux) > 0 {
		base := math.Log(s.alpha/float64(len(s.aux))) + d.CountLogPred(0, 0, pa, pb)
		for j := range s.aux {
			w := base + d.valueLogLik(&s.auxKern[j])
			s.logw = append(s.logw, w)
			s.cand = append(s.cand, Absent)
			if w > maxw {
				maxw = w
			}
		}
	}
	s.prob = s.prob[:0]
	sum := 0.0
	for _, w := range s.logw {
		e := expFast(w - maxw)
		s.prob = append(s.prob, e)
		sum += e
	}
	s.probSum = sum
	return maxw + logFast(sum)
}

// pick draws an index of the terms of the last predictiveTerms call with
// probability proportional to exp(logw).
func (s *State) pick(src *rand.Rand) int {
	u := src.Float64() * s.probSum
	acc := 0.0
	for j, e := range s.prob {
		acc += e
		if u < acc {
			return j
		}
	}
	return len(s.prob) - 1
}

// drawAux fills s.aux with m thetas from the base measure; when own is
// non-nil it takes the first slot (Algorithm 8 for a product that was
// alone in its segment).
func (s *State) drawAux(own *Theta, src *rand.Rand) {
	s.aux = s.aux[:0]
	if own != nil {
		s.aux = append(s.aux, *own)
	}
	for len(s.aux) < s.m {
		s.aux = append(s.aux, s.prior.DrawTheta(src))
	}
	s.auxKern = s.auxKern[:0]
	for _, t := range s.aux {
		s.auxKern = append(s.auxKern, t.kernel())
	}
}

// place draws a segment for slot i (datum d, in no segment) from the
// terms of the last predictiveTerms call, which must have been for d, and
// joins it; auxiliary picks open a new segment.
func (s *State) place(i int, d *Datum, src *rand.Rand) {
	j := s.pick(src)
	c := s.cand[j]
	if c == Absent {
		c = s.newSegment(s.aux[j-(len(s.cand)-len(s.aux))])
	}
	s.join(i, d, c)
}

// detach takes slot i (datum d) out of its segment and prepares the
// auxiliary thetas of Algorithm 8: the emptied segment's own theta first
// when i was alone, fresh base-measure draws for the rest.
func (s *State) detach(i int, d *Datum, src *rand.Rand) {
	c, emptied := s.leave(i, d)
	if emptied {
		t := s.segs[c].theta
		s.drawAux(&t, src)
	} else {
		s.drawAux(nil, src)
	}
}

// keepLogRatio returns log f(new)/f(old) for slot i, which holds datum
// old, under its current segment: the value likelihoods under the
// segment's kernel and the beta-binomial predictives of the two counts
// given the segment's other members. It is the exact ratio of the targets
// with new and with old in place when the assignment is kept (the CRP
// sizes do not change). The state is not changed.
func (s *State) keepLogRatio(i int, old, new *Datum) float64 {
	g := &s.segs[s.label(i)]
	r, n := g.reported-old.N(), g.considered-old.L()
	pa, pb := s.prior.CountA, s.prior.CountB
	return new.CountLogPred(r, n, pa, pb) - old.CountLogPred(r, n, pa, pb) +
		new.valueLogLik(&g.kern) - old.valueLogLik(&g.kern)
}

// swapDatum replaces slot i's datum old by new in the count totals of its
// segment, keeping the assignment (the caller updates the shared data).
func (s *State) swapDatum(i int, old, new *Datum) {
	g := &s.segs[s.label(i)]
	g.reported += new.N() - old.N()
	g.considered += new.L() - old.L()
}

// replacePredictives returns log Z(others, old) and log Z(others, new) for
// slot i, which holds datum old: the Algorithm-8 sums of a Replace's
// redraw, each with its own auxiliaries (the segment's own theta first
// when i is alone in it), computed as if i had left its segment. The state
// is left as it was, labels untouched; only the scratch and src change.
func (s *State) replacePredictives(i int, old, new *Datum, src *rand.Rand) (logZOld, logZNew float64) {
	g := &s.segs[s.label(i)]
	g.size--
	g.reported -= old.N()
	g.considered -= old.L()
	if g.size == 0 {
		t := g.theta
		s.drawAux(&t, src)
	} else {
		s.drawAux(nil, src)
	}
	logZOld = s.predictiveTerms(old)
	s.drawAux(nil, src)
	logZNew = s.predictiveTerms(new)
	g.size++
	g.reported += old.N()
	g.considered += old.L()
	return logZOld, logZNew
}

// reassign is one Algorithm-8 (Neal 2000) update of product i's segment:
// it leaves the current posterior invariant.
func (s *State) reassign(i int, src *rand.Rand) {
	d := s.data[i]
	s.detach(i, d, src)
	s.predictiveTerms(d)
	s.place(i, d, src)
}

// members returns, for every segment index, the present slots in it.
// The result reuses buf when it is large enough.
func (s *State) members(buf [][]int) [][]int {
	if cap(buf) < len(s.segs) {
		buf = make([][]int, len(s.segs))
	}
	buf = buf[:len(s.segs)]
	for c := range buf {
		buf[c] = buf[c][:0]
	}
	for i, c := range s.labels.l {
		if c != Absent {
			buf[c] = append(buf[c], i)
		}
	}
	return buf
}

// thetaMoves is the number of Metropolis rounds per kernel update, and
// thetaStepK, thetaStepS the random-walk steps of log k and of k log s for
// one value; they shrink like 1/sqrt of the segment's number of values.
// Tuned on simulated categories for acceptance rates of about 0.3 to 0.6
// over segments of 3 to 1,500 products (a rate near 0.44 is the usual
// aim for one-dimensional random walks; common practice).
const (
	thetaMoves             = 2
	thetaStepK, thetaStepS = 1.4, 1.6
)

// updateTheta refreshes segment c's kernel parameters, targeting G0 times
// the value likelihood of the members (the count part does not depend on
// theta): a univariate slice update (Neal 2003, stepping out and
// shrinkage) of log a, then thetaMoves rounds of random-walk Metropolis
// proposals for log k and for log s.
func (s *State) updateTheta(c uint16, mem []int, src *rand.Rand) {
	g := &s.segs[c]
	t := g.theta
	data := s.data
	pr := s.prior

	// log a: for fixed k and s the value part is linear in a and log a
	// (valueSplit), so one pass over the members makes each evaluation
	// O(1), and gives the value part at the new a for the Metropolis
	// steps below without another pass.
	kn := t.kernel()
	nTot, sumG, rest := 0.0, 0.0, 0.0
	for _, i := range mem {
		d := data[i]
		if d.N() == 0 {
			continue
		}
		r, g := d.valueSplit(&kn, t.LogK-t.LogS)
		nTot += float64(d.N())
		rest += r
		sumG += g
	}
	t.LogA = sliceSample(t.LogA, func(la float64) float64 {
		return pr.LogA.logProb(la) + nTot*la + math.Exp(la)*sumG
	}, 1, src)

	// log k and log s: random-walk Metropolis, one coordinate at a
	// time, with a step that shrinks like 1/sqrt(number of values). A
	// member-pass per proposal is the whole cost, so a few proposals
	// replace the ten or so passes a slice update needs once the
	// conditional is much narrower than the prior. The step depends only
	// on the assignments, which this move does not change, so each
	// proposal is a symmetric Metropolis step and leaves the conditional
	// invariant.
	full := func(th Theta) float64 {
		k := th.kernel()
		ll := pr.LogBase(th)
		for _, i := range mem {
			ll += data[i].valueLogLik(&k)
		}
		return ll
	}
	cur := pr.LogBase(t) + rest + nTot*t.LogA + math.Exp(t.LogA)*sumG
	stepK := math.Min(pr.LogK.Sigma, thetaStepK/math.Sqrt(1+nTot))
	for r := 0; r < thetaMoves; r++ {
		prop := t
		prop.LogK += stepK * src.NormFloat64()
		if lp := full(prop); math.Log1p(-src.Float64()) < lp-cur {
			t, cur = prop, lp
		}
		// The spread of log s given k narrows like 1/k; k is held
		// fixed by this proposal, so scaling by it keeps it symmetric.
		stepS := math.Min(pr.LogS.Sigma, thetaStepS/(math.Exp(t.LogK)*math.Sqrt(1+nTot)))
		prop = t
		prop.LogS += stepS * src.NormFloat64()
		if lp := full(prop); math.Log1p(-src.Float64()) < lp-cur {
			t, cur = prop, lp
		}
	}
	g.setTheta(t)
}

// updateKernelsAndAlpha refreshes every occupied segment's kernel
// (updateTheta) and then alpha: the second half of a sweep. mem is reused
// for the member lists and returned.
func (s *State) updateKernelsAndAlpha(mem [][]int, src *rand.Rand) [][]int {
	mem = s.members(mem)
	for c := range s.segs {
		if s.segs[c].size > 0 {
			s.updateTheta(uint16(c), mem[c], src)
		}
	}
	s.updateAlpha(src)
	return mem
}

// updateAlpha draws alpha given the number of segments K and products N
// with the auxiliary-variable scheme of Escobar and West (1995) under a
// Gamma(shape, rate) prior.
func (s *State) updateAlpha(src *rand.Rand) {
	n := float64(s.n)
	if s.n == 0 {
		s.alpha = s.prior.DrawAlpha(src)
		return
	}
	k := float64(s.numSegments())
	a0, b0 := s.prior.AlphaShape, s.prior.AlphaRate
	eta := betaRand(src, s.alpha+1, n)
	rate := b0 - math.Log(eta)
	odds := (a0 + k - 1) / (n * rate)
	shape := a0 + k - 1
	if src.Float64() < odds/(1+odds) {
		shape = a0 + k
	}
	s.alpha = gammaRand(src, shape) / rate
}

// sliceSample returns one univariate slice-sampling update of x for the
// log density f, with initial bracket width w, stepping out at most 32
// widths and shrinking (Neal 2003, figures 3 and 5).
func sliceSample(x float64, f func(float64) float64, w float64, src *rand.Rand) float64 {
	fx := f(x)
	logy := fx + math.Log(1-src.Float64()) // log(u * f(x)), u in (0, 1]
	lo := x - w*src.Float64()
	hi := lo + w
	j := src.IntN(32)
	kk := 31 - j
	for ; j > 0 && f(lo) > logy; j-- {
		lo -= w
	}
	for ; kk > 0 && f(hi) > logy; kk-- {
		hi += w
	}
	for {
		x1 := lo + src.Float64()*(hi-lo)
		if f(x1) > logy {
			return x1
		}
		if x1 < x {
			lo = x1
		} else {
			hi = x1
		}
		if hi-lo < 1e-12 {
			return x
		}
	}
}

// draw exports the state as a Draw over slots (labels shared, not copied).
func (s *State) draw(logWeight float64) Draw {
	th := make([]Theta, len(s.segs))
	for c := range s.segs {
		th[c] = s.segs[c].theta
	}
	return Draw{LogWeight: logWeight, Labels: s.labels.l, Segments: th, Alpha: s.alpha}
}
