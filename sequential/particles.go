package sequential

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
)

// Sentinel errors of the particle system's operations.
var (
	ErrUnknownProduct = errors.New("sequential: unknown product")
	ErrDuplicate      = errors.New("sequential: product already present")
)

// Particles is the sequential Monte Carlo updater (see the package doc
// for the derivation of its weights and steps). It holds a population of
// P weighted States over shared product slots. A new system holds no
// population: products added before its first build are only recorded,
// and Build (or the first SettleRefit) makes the population from batch
// chains; later changes move it. Every operation is deterministic given
// the seed and the sequence of operations, whatever Workers is. Not safe
// for concurrent use.
type Particles struct {
	cfg   ParticleConfig
	prior Prior

	master *rand.PCG // the one seeded generator; its state is saved
	slots  []*Datum  // product data by slot; nil when free
	ids    []string  // product id by slot; "" when free
	index  map[string]int
	free   []int // free slots, reused last-in first-out
	n      int   // products present
	built  bool  // the population has been made (Build)

	// keptReplaces and redrawnReplaces count the two forms of Replace
	// (diagnostics, not encoded).
	keptReplaces, redrawnReplaces uint64

	parts   []*State
	logw    []float64
	origin  []int // index of each particle's ancestor at the last build
	touched []int // slots changed since the last settle, in order
	isTouch []bool
	// resampledSince records a resampling since the last settle (saved).
	resampledSince bool
	// logMoved is the log of the product of the ESS shares that the
	// resamplings since the last waste-free step absorbed (saved): with
	// the current ESS share it says how far the target has moved.
	logMoved float64

	logEvidence float64 // running sum of log normalised incremental weights

	// soft[p] is the placement record of the scan that made particle p in
	// the last waste-free step or build; nil when there is none or a
	// change has made it stale.
	soft []*Soft

	moves    MoveStats  // split-merge outcomes since creation (not saved)
	lastStep StepReport // the last waste-free step (not saved)

	// per-operation scratch, not part of the state
	streams []*rand.Rand
	pcgs    []*rand.PCG
	incr    []float64
	memoOp  uint64
}

// NewParticles returns an empty particle system of P particles, seeded by
// (seed1, seed2). It has no population until Build.
func NewParticles(cfg ParticleConfig, seed1, seed2 uint64) (*Particles, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	ps := &Particles{cfg: cfg, prior: cfg.Prior, master: rand.NewPCG(seed1, seed2), index: map[string]int{}}
	src := rand.New(ps.master)
	ps.parts = make([]*State, cfg.Particles)
	ps.logw = make([]float64, cfg.Particles)
	ps.origin = make([]int, cfg.Particles)
	for p := range ps.parts {
		ps.parts[p] = newState(&ps.prior, cfg.Aux, 0, ps.prior.DrawAlpha(src))
		ps.origin[p] = p
	}
	ps.initScratch()
	return ps, nil
}

func (ps *Particles) initScratch() {
	P := len(ps.parts)
	ps.pcgs = make([]*rand.PCG, P)
	ps.streams = make([]*rand.Rand, P)
	for p := range ps.pcgs {
		ps.pcgs[p] = rand.NewPCG(0, 0)
		ps.streams[p] = rand.New(ps.pcgs[p])
	}
	ps.incr = make([]float64, P)
}

// Built reports whether the population has been made.
func (ps *Particles) Built() bool { return ps.built }

// Pending returns the number of products changed since the last settle.
// It is part of the saved state, so a caller that settles every k pending
// changes settles at the same points after a restart from a snapshot.
func (ps *Particles) Pending() int { return len(ps.touched) }

// Len returns the number of products present.
func (ps *Particles) Len() int { return ps.n }

// NumParticles returns P.
func (ps *Particles) NumParticles() int { return len(ps.parts) }

// Has reports whether product id is present.
func (ps *Particles) Has(id string) bool { _, ok := ps.index[id]; return ok }

// Products returns the ids of the present products in slot order, the
// order of Draws and Data.
func (ps *Particles) Products() []string {
	out := make([]string, 0, ps.n)
	for s, id := range ps.ids {
		if ps.slots[s] != nil {
			out = append(out, id)
		}
	}
	return out
}

// LogEvidence returns the running estimate of the log marginal likelihood
// of the changes since the first build (the sum of the log normalised
// incremental weights of every operation since; the batch chains of a
// build estimate no evidence). A system built with no products counts
// every product.
func (ps *Particles) LogEvidence() float64 { return ps.logEvidence }

// Moves returns the split-merge outcomes of the builds and waste-free
// steps since this system was created or decoded.
func (ps *Particles) Moves() MoveStats { return ps.moves }

// ReplaceForms returns how many Replaces kept the assignments and how
// many redrew them since this system was created or decoded (the counts
// are not encoded).
func (ps *Particles) ReplaceForms() (kept, redrawn uint64) {
	return ps.keptReplaces, ps.redrawnReplaces
}

// SetKeepESS changes KeepESS for later Replaces (0 always redraws).
func (ps *Particles) SetKeepESS(f float64) error {
	if !(f >= 0 && f <= 1) {
		return fmt.Errorf("%w: keep ess = %v, want in [0, 1]", ErrConfig, f)
	}
	ps.cfg.KeepESS = f
	return nil
}

// SetRejuvenation changes the move budget of later settles: sweeps passes,
// each over the changed products plus, after a resampling, a random share
// of the others.
func (ps *Particles) SetRejuvenation(sweeps int, share float64) {
	ps.cfg.Sweeps, ps.cfg.RandomShare = sweeps, share
}

// reseed points every particle's stream at a fresh key from the master
// generator: particle p's stream depends only on the master state and p,
// never on which goroutine runs it.
func (ps *Particles) reseed() {
	k1, k2 := ps.master.Uint64(), ps.master.Uint64()
	for p, g := range ps.pcgs {
		g.Seed(k1, k2^(uint64(p)+1)*0x9e3779b97f4a7c15)
	}
}

// forEach runs f for every particle over the configured workers and
// waits. f must touch only particle p's state and ps.incr[p]. Any change
// makes the placement records stale.
func (ps *Particles) forEach(f func(p int, st *State, src *rand.Rand)) {
	ps.soft = nil
	ps.reseed()
	parallelFor(ps.cfg.Workers, len(ps.parts), func(p int) {
		f(p, ps.parts[p], ps.streams[p])
	})
}

// applyIncrements adds incr to the log weights and returns the log of
// the weighted mean of exp(incr) under the weights before the update: the
// log of the ratio of the new target's normalising constant to the old
// one's (for an Add, the log predictive density of the datum). The
// running evidence estimate moves by the same amount.
func (ps *Particles) applyIncrements(incr []float64) float64 {
	lp := logMeanExpWeighted(ps.logw, incr)
	for p := range ps.logw {
		ps.logw[p] += incr[p]
	}
	// Keep weights near 0 so they never overflow.
	mw2 := maxOf(ps.logw)
	for p := range ps.logw {
		ps.logw[p] -= mw2
	}
	ps.logEvidence += lp
	return lp
}

func (ps *Particles) markTouched(slot int) {
	if !ps.isTouch[slot] {
		ps.isTouch[slot] = true
		ps.touched = append(ps.touched, slot)
	}
}

// newSlot allocates a slot for id.
func (ps *Particles) newSlot(id string, d *Datum) int {
	var s int
	if k := len(ps.free); k > 0 {
		s = ps.free[k-1]
		ps.free = ps.free[:k-1]
	} else {
		s = len(ps.slots)
		ps.slots = append(ps.slots, nil)
		ps.ids = append(ps.ids, "")
		ps.isTouch = append(ps.isTouch, false)
		for _, st := range ps.parts {
			st.growSlots(len(ps.slots))
		}
	}
	for _, st := range ps.parts {
		st.data = ps.slots
	}
	ps.slots[s] = d
	ps.ids[s] = id
	ps.index[id] = s
	return s
}

// dropSlot forgets the product in slot s.
func (ps *Particles) dropSlot(s int) {
	delete(ps.index, ps.ids[s])
	ps.slots[s] = nil
	ps.ids[s] = ""
	ps.free = append(ps.free, s)
	if ps.isTouch[s] {
		ps.isTouch[s] = false
		k := 0
		for _, t := range ps.touched {
			if t != s {
				ps.touched[k] = t
				k++
			}
		}
		ps.touched = ps.touched[:k]
	}
}

// growSlots extends the label storage to n slots (new slots absent).
func (s *State) growSlots(n int) {
	old := s.labels.l
	if len(old) >= n {
		return
	}
	if s.labels.refs.Load() == 1 && cap(old) >= n {
		s.labels.l = old[:n]
		for i := len(old); i < n; i++ {
			s.labels.l[i] = Absent
		}
		return
	}
	l := make([]uint16, n, max(2*n, 64))
	copy(l, old)
	for i := len(old); i < n; i++ {
		l[i] = Absent
	}
	nb := &labelBuf{l: l}
	nb.refs.Store(1)
	s.labels.refs.Add(-1)
	s.labels = nb
}

// memoValues computes, once per distinct segment kernel in the
// population, the value log densities of the given data (at most two),
// into the kernels' memo: copies of a segment made by resampling share
// one kernel until either is written, so after a resampling most of the
// population's segments are shared (package doc, "Cheaper changes").
// Later predictiveTermsMemo calls read them.
func (ps *Particles) memoValues(data ...*Datum) {
	ps.memoOp++
	op := ps.memoOp
	var distinct []*kernelMemo
	for _, st := range ps.parts {
		for c := range st.segs {
			g := &st.segs[c]
			if g.size > 0 && g.memo.op != op {
				g.memo.op = op
				distinct = append(distinct, g.memo)
			}
		}
	}
	parallelFor(ps.cfg.Workers, len(distinct), func(i int) {
		m := distinct[i]
		for j, d := range data {
			m.v[j] = d.valueLogLik(&m.kern)
		}
	})
}

// Add brings product id with datum d into every particle by the
// Algorithm-8 proposal; the incremental weight is Z / (N + alpha)
// (package doc). It returns the log predictive density of d given the
// data already present. Before the first build it only records the
// product and returns NaN.
func (ps *Particles) Add(id string, d Datum) (float64, error) {
	if _, ok := ps.index[id]; ok {
		return 0, fmt.Errorf("%w: %q", ErrDuplicate, id)
	}
	dp := &d
	slot := ps.newSlot(id, dp)
	ps.n++
	if !ps.built {
		return math.NaN(), nil
	}
	nPrev := float64(ps.n - 1)
	ps.memoValues(dp)
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		st.drawAux(nil, src)
		logZ := st.predictiveTermsMemo(dp, 0)
		ps.incr[p] = logZ - math.Log(nPrev+st.alpha)
		st.place(slot, dp, src)
		st.n++
	})
	ps.markTouched(slot)
	lp := ps.applyIncrements(ps.incr)
	ps.maybeResample(slot)
	return lp, nil
}

// Replace swaps product id's datum for d (a refit). When keeping every
// particle's assignment, with incremental weight f(new)/f(old), passes
// the two tests of KeepESS (replaceKeeping), it does that; the settle
// then moves the product. Otherwise, in each particle the product leaves
// its segment and is placed again by the Algorithm-8 proposal, with
// incremental weight Z(others, new) / Z(others, old). It returns the log
// predictive density of d given the other products (estimated on a
// subset of the particles when the assignment was kept). Before the first
// build it only records the new datum and returns NaN.
func (ps *Particles) Replace(id string, d Datum) (float64, error) {
	slot, ok := ps.index[id]
	if !ok {
		return 0, fmt.Errorf("%w: %q", ErrUnknownProduct, id)
	}
	old := ps.slots[slot]
	dp := &d
	if !ps.built {
		ps.slots[slot] = dp
		return math.NaN(), nil
	}
	if ps.cfg.KeepESS > 0 {
		if lp, ok := ps.replaceKeeping(slot, old, dp); ok {
			ps.keptReplaces++
			ps.slots[slot] = dp
			ps.markTouched(slot)
			ps.maybeResample(slot)
			return lp, nil
		}
	}
	nOthers := float64(ps.n - 1)
	// Split the increment in two so that the predictive of the new datum
	// is reported against the weights with the old datum removed.
	rem := make([]float64, len(ps.parts))
	ps.memoValues(old, dp)
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		st.detach(slot, old, src)
		logZOld := st.predictiveTermsMemo(old, 0)
		rem[p] = math.Log(nOthers+st.alpha) - logZOld
		st.drawAux(nil, src)
		logZNew := st.predictiveTermsMemo(dp, 1)
		ps.incr[p] = logZNew - math.Log(nOthers+st.alpha)
		st.place(slot, dp, src)
	})
	ps.redrawnReplaces++
	ps.applyIncrements(rem)
	ps.slots[slot] = dp
	lp := ps.applyIncrements(ps.incr)
	ps.markTouched(slot)
	ps.maybeResample(slot)
	return lp, nil
}

// surpriseSample is the number of particles, evenly spaced in index,
// on which a Replace that keeps the assignments estimates the new
// datum's log predictive density. Spacing them evenly matters: after a
// systematic resampling the copies of one ancestor sit next to each other.
const surpriseSample = 32

// replaceKeeping computes the keep-assignment weights f(new)/f(old) of a
// Replace of slot (datum old by new) and applies them, if they pass two
// tests, to the weights, the segments' count totals and the evidence:
//
//   - their ESS is at least KeepESS times the current one;
//   - their weighted mean, an estimate of p(new | others) / p(old | others),
//     is at least KeepESS times the redraw's estimate of the same ratio,
//     the weighted mean of Z(others, new) / Z(others, old) on
//     surpriseSample particles. When the new datum fits another segment
//     than the one the particles hold the product in, every keep weight
//     is small, and nearly equal, so the ESS alone would not notice; the
//     redraw, which looks at every segment, does.
//
// The surprise is log p(new | others), estimated from the same sample's
// two Algorithm-8 sums, which leave the states as they were. It reports
// false, having changed nothing but the generator, when a test fails.
func (ps *Particles) replaceKeeping(slot int, old, dp *Datum) (float64, bool) {
	P := len(ps.parts)
	S := min(surpriseSample, P)
	inSample := make([]bool, P)
	for j := range S {
		inSample[j*P/S] = true
	}
	logZOld := make([]float64, P)
	logZNew := make([]float64, P)
	soft := ps.soft
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		ps.incr[p] = st.keepLogRatio(slot, old, dp)
		if inSample[p] {
			logZOld[p], logZNew[p] = st.replacePredictives(slot, old, dp, src)
		}
	})
	// With W the current weights: the redraw's ratio is sum W e^(Z_new -
	// Z_old) / sum W, and log p(new | others) is
	// log [sum W e^(Z_new - Z_old) / sum W (N-1+alpha) e^(-Z_old)], the
	// redraw's two increments, Remove then Add, chained (see Replace).
	nOthers := float64(ps.n - 1)
	mw := maxOf(ps.logw)
	var num, den, w []float64
	for p := range P {
		if inSample[p] {
			a := ps.logw[p] - mw
			num = append(num, a+logZNew[p]-logZOld[p])
			den = append(den, a-logZOld[p]+math.Log(nOthers+ps.parts[p].alpha))
			w = append(w, a)
		}
	}
	logRedraw := logSumExp(num) - logSumExp(w)
	logKeep := logMeanExpWeighted(ps.logw, ps.incr)
	// NaN (every weight zero) fails the tests too.
	if !(essAfter(ps.logw, ps.incr) >= ps.cfg.KeepESS*ps.ESS() && logKeep >= logRedraw+math.Log(ps.cfg.KeepESS)) {
		ps.soft = soft // nothing changed
		return 0, false
	}
	lp := logSumExp(num) - logSumExp(den)
	// A few integer updates per particle: no need for the workers (and
	// their reseeding) here.
	for _, st := range ps.parts {
		st.swapDatum(slot, old, dp)
	}
	ps.applyIncrements(ps.incr)
	return lp, true
}

// Remove takes product id out of every particle (a delisting), with
// incremental weight (N - 1 + alpha) / Z(others, datum). Before the
// first build it only forgets the product.
func (ps *Particles) Remove(id string) error {
	slot, ok := ps.index[id]
	if !ok {
		return fmt.Errorf("%w: %q", ErrUnknownProduct, id)
	}
	old := ps.slots[slot]
	if !ps.built {
		ps.n--
		ps.dropSlot(slot)
		return nil
	}
	nOthers := float64(ps.n - 1)
	ps.memoValues(old)
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		st.detach(slot, old, src)
		ps.incr[p] = math.Log(nOthers+st.alpha) - st.predictiveTermsMemo(old, 0)
		st.n--
	})
	before := ps.ESS()
	ev := ps.logEvidence
	ps.applyIncrements(ps.incr)
	// The removal weight is the reciprocal of a predictive density: when
	// the product had a segment of its own it is heavy-tailed and the ESS
	// collapses. Resampling alone would leave few distinct ancestors, so
	// a collapse is followed by a waste-free step.
	collapsed := ps.ESS() < ps.cfg.ESSFraction*before
	ps.n--
	ps.dropSlot(slot)
	if collapsed {
		ps.wasteFree()
	} else {
		ps.maybeResample(-1)
	}
	// The evidence moves by the forward predictive of the datum given the
	// others, estimated with fresh auxiliaries on the moved particles: an
	// unbiased estimate of p(y | others), without the heavy tail of the
	// reciprocal weights.
	fwd := make([]float64, len(ps.parts))
	soft := ps.soft
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		removal, removalKern := st.aux, st.auxKern // keep the removal's auxiliaries for inspection
		st.aux, st.auxKern = nil, nil
		st.drawAux(nil, src)
		fwd[p] = st.predictiveTerms(old) - math.Log(nOthers+st.alpha)
		st.aux, st.auxKern = removal, removalKern
	})
	ps.soft = soft // the evidence estimate changed no state
	ps.logEvidence = ev - logMeanExpWeighted(ps.logw, fwd)
	return nil
}

// Data returns the data of the present products in slot order.
func (ps *Particles) Data() []*Datum {
	out := make([]*Datum, 0, ps.n)
	for _, d := range ps.slots {
		if d != nil {
			out = append(out, d)
		}
	}
	return out
}
