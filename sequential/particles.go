package sequential

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"sort"
	"sync"
	"sync/atomic"
)

// Resampler names a resampling scheme.
type Resampler int

const (
	// Systematic resampling: one uniform, P evenly spaced points.
	Systematic Resampler = iota
	// Residual resampling: floor(P w) copies each, the rest multinomially.
	Residual
)

// String returns the scheme's name as used in settings.
func (r Resampler) String() string {
	switch r {
	case Systematic:
		return "systematic"
	case Residual:
		return "residual"
	}
	return fmt.Sprintf("Resampler(%d)", int(r))
}

// ParseResampler maps "systematic" or "residual" to a Resampler.
func ParseResampler(s string) (Resampler, error) {
	switch s {
	case "systematic":
		return Systematic, nil
	case "residual":
		return Residual, nil
	}
	return 0, fmt.Errorf("%w: resampler %q, want systematic or residual", ErrConfig, s)
}

// ParticleConfig sets up the sequential updater.
type ParticleConfig struct {
	Prior Prior
	// Aux is the number m of auxiliary segments per placement (Algorithm 8).
	Aux int
	// Particles is P, the number of particles.
	Particles int
	// ESSFraction triggers resampling when the effective sample size
	// falls below ESSFraction * P; in (0, 1].
	ESSFraction float64
	Resampler   Resampler
	// Sweeps is the number of rejuvenation passes at a settle; each pass
	// reassigns the products touched since the last settle plus, when the
	// particles were resampled since the last settle, a random
	// RandomShare of the others, then refreshes the kernel of each
	// segment holding t touched products of n with probability
	// min(1, 2t/n), and alpha.
	Sweeps      int
	RandomShare float64
	// RefitSweeps is the number of passes over every product and segment
	// that SettleRefit runs at the end of a refit, and that a Remove runs
	// when its weights collapse the ESS.
	RefitSweeps int
	// KeepSweeps is how many of a settle's last rejuvenation sweeps each
	// particle keeps as draws for the summaries (1 = the final state
	// only). Every kept state is a draw from the same weighted target, so
	// averaging over them lowers the Monte Carlo error of the summaries
	// at the cost of P * KeepSweeps label copies.
	KeepSweeps int
	// KeepESS chooses between the two exact forms of a Replace (package
	// doc): the assignment is kept, with weight f(new)/f(old), when that
	// leaves an effective sample size of at least KeepESS times the one
	// before and the weights' mean is at least KeepESS times the redraw's
	// estimate of the same predictive ratio; otherwise the product is
	// placed afresh. 0 always places afresh; in [0, 1].
	KeepESS float64
	// Workers is the number of goroutines over particles; 0 means
	// GOMAXPROCS. Results do not depend on it.
	Workers int
}

// DefaultParticleConfig returns P = 256, m = 3, resampling below P/2 with
// the systematic scheme, 2 rejuvenation sweeps per settle over the touched
// products plus, after a resampling, 10% of the rest, 10 sweeps over all
// products at the end of a refit, the states of the last 4 sweeps kept as
// draws, and every Replace redrawn (KeepESS 0).
//
// KeepESS is 0 on measurements: in diagnostic runs on simulated
// categories of 300 products, keeping assignments (KeepESS 0.9) gave the
// same agreement with a long batch run on re-estimating refits and a
// worse one in 5 of 6 runs on refits that redraw every product
// (DEVELOPERS.md has the table).
func DefaultParticleConfig() ParticleConfig {
	return ParticleConfig{Prior: DefaultPrior(), Aux: 3, Particles: 256, ESSFraction: 0.5,
		Resampler: Systematic, Sweeps: 2, RandomShare: 0.1, RefitSweeps: 10, KeepSweeps: 4}
}

// Validate reports the first setting out of range.
func (c ParticleConfig) Validate() error {
	if err := c.Prior.Validate(); err != nil {
		return err
	}
	switch {
	case c.Aux < 1:
		return fmt.Errorf("%w: aux = %d, want >= 1", ErrConfig, c.Aux)
	case c.Particles < 1 || c.Particles > 1<<16:
		return fmt.Errorf("%w: particles = %d, want 1..65536", ErrConfig, c.Particles)
	case !(c.ESSFraction > 0 && c.ESSFraction <= 1):
		return fmt.Errorf("%w: ess fraction = %v, want in (0, 1]", ErrConfig, c.ESSFraction)
	case c.Resampler != Systematic && c.Resampler != Residual:
		return fmt.Errorf("%w: resampler %d unknown", ErrConfig, int(c.Resampler))
	case c.Sweeps < 0:
		return fmt.Errorf("%w: sweeps = %d, want >= 0", ErrConfig, c.Sweeps)
	case c.RefitSweeps < 0:
		return fmt.Errorf("%w: refit sweeps = %d, want >= 0", ErrConfig, c.RefitSweeps)
	case c.KeepSweeps < 1:
		return fmt.Errorf("%w: keep sweeps = %d, want >= 1", ErrConfig, c.KeepSweeps)
	case !(c.RandomShare >= 0 && c.RandomShare <= 1):
		return fmt.Errorf("%w: random share = %v, want in [0, 1]", ErrConfig, c.RandomShare)
	case !(c.KeepESS >= 0 && c.KeepESS <= 1):
		return fmt.Errorf("%w: keep ess = %v, want in [0, 1]", ErrConfig, c.KeepESS)
	case c.Workers < 0:
		return fmt.Errorf("%w: workers = %d, want >= 0", ErrConfig, c.Workers)
	}
	return nil
}

// Sentinel errors of the particle system's operations.
var (
	ErrUnknownProduct = errors.New("sequential: unknown product")
	ErrDuplicate      = errors.New("sequential: product already present")
)

// Particles is the sequential Monte Carlo updater (see the package doc for
// the derivation of its weights). It holds P weighted States over shared
// product slots. Every operation is deterministic given the seed and the
// sequence of operations, whatever Workers is. Not safe for concurrent use.
type Particles struct {
	cfg   ParticleConfig
	prior Prior

	master *rand.PCG // the one seeded generator; its state is saved
	slots  []*Datum  // product data by slot; nil when free
	ids    []string  // product id by slot; "" when free
	index  map[string]int
	free   []int // free slots, reused last-in first-out
	n      int   // products present

	// keptReplaces and redrawnReplaces count the two forms of Replace
	// (diagnostics, not encoded).
	keptReplaces, redrawnReplaces uint64

	parts   []*State
	logw    []float64
	origin  []int // index of each particle's ancestor at the last reset
	touched []int // slots changed since the last settle, in order
	isTouch []bool
	// resampledSince records a resampling since the last settle (saved).
	resampledSince bool

	logEvidence float64 // running sum of log normalised incremental weights

	// kept[p] holds particle p's states after the last KeepSweeps sweeps of
	// the latest settle, valid until the next change (derived, not saved).
	kept      [][]Draw
	keptValid bool

	// per-operation scratch, not part of the state
	streams []*rand.Rand
	pcgs    []*rand.PCG
	incr    []float64
}

// NewParticles returns an empty particle system: P particles with no
// products and alpha drawn from its prior, seeded by (seed1, seed2).
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
// order used by Settle's summaries.
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
// of the data present now (the sum of the log normalised incremental
// weights of every operation so far).
func (ps *Particles) LogEvidence() float64 { return ps.logEvidence }

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
// waits. f must touch only particle p's state and ps.incr[p].
func (ps *Particles) forEach(f func(p int, st *State, src *rand.Rand)) {
	ps.keptValid = false
	ps.reseed()
	w := ps.cfg.Workers
	if w == 0 {
		w = runtime.GOMAXPROCS(0)
	}
	P := len(ps.parts)
	w = min(w, P)
	if w <= 1 {
		for p, st := range ps.parts {
			f(p, st, ps.streams[p])
		}
		return
	}
	// Particles are handed out one at a time, so a worker that drew
	// cheap particles takes more of them; each particle's result depends
	// only on its own stream, not on which worker ran it.
	var wg sync.WaitGroup
	var next atomic.Int64
	for range w {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				p := int(next.Add(1) - 1)
				if p >= P {
					return
				}
				f(p, ps.parts[p], ps.streams[p])
			}
		}()
	}
	wg.Wait()
}

// applyIncrements adds incr to the log weights and returns the log of
// the weighted mean of exp(incr) under the weights before the update: the
// log of the ratio of the new target's normalising constant to the old
// one's (for an Add, the log predictive density of the datum). The
// running evidence estimate moves by the same amount.
func (ps *Particles) applyIncrements(incr []float64) float64 {
	mw := maxOf(ps.logw)
	m := math.Inf(-1)
	for p := range ps.logw {
		m = math.Max(m, ps.logw[p]-mw+incr[p])
	}
	var num, den float64
	for p := range ps.logw {
		a := ps.logw[p] - mw
		den += math.Exp(a)
		num += math.Exp(a + incr[p] - m)
		ps.logw[p] += incr[p]
	}
	// Keep weights near 0 so they never overflow.
	mw2 := maxOf(ps.logw)
	for p := range ps.logw {
		ps.logw[p] -= mw2
	}
	lp := m + math.Log(num) - math.Log(den)
	ps.logEvidence += lp
	return lp
}

// logMeanExp returns log sum_p W_p exp(x_p) under the current normalised
// weights.
func (ps *Particles) logMeanExp(x []float64) float64 {
	mw := maxOf(ps.logw)
	m := math.Inf(-1)
	for p := range x {
		m = math.Max(m, ps.logw[p]-mw+x[p])
	}
	var num, den float64
	for p := range x {
		a := ps.logw[p] - mw
		den += math.Exp(a)
		num += math.Exp(a + x[p] - m)
	}
	return m + math.Log(num) - math.Log(den)
}

func maxOf(x []float64) float64 {
	m := math.Inf(-1)
	for _, v := range x {
		m = math.Max(m, v)
	}
	return m
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

// Add brings product id with datum d into every particle by the Algorithm-8
// proposal; the incremental weight is Z / (N + alpha) (package doc). It
// returns the log predictive density of d given the data already present.
func (ps *Particles) Add(id string, d Datum) (float64, error) {
	if _, ok := ps.index[id]; ok {
		return 0, fmt.Errorf("%w: %q", ErrDuplicate, id)
	}
	dp := &d
	slot := ps.newSlot(id, dp)
	nPrev := float64(ps.n)
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		st.drawAux(nil, src)
		logZ := st.predictiveTerms(dp)
		ps.incr[p] = logZ - math.Log(nPrev+st.alpha)
		st.place(slot, dp, src)
		st.n++
	})
	ps.n++
	ps.markTouched(slot)
	lp := ps.applyIncrements(ps.incr)
	ps.maybeResample()
	return lp, nil
}

// Replace swaps product id's datum for d (a refit). When keeping every
// particle's assignment, with incremental weight f(new)/f(old), passes
// the two tests of KeepESS (replaceKeeping), it does that; the settle
// then moves the product. Otherwise, in each
// particle the product leaves its segment and is placed again by the
// Algorithm-8 proposal, with incremental weight Z(others, new) /
// Z(others, old). It returns the log predictive density of d given the
// other products (estimated on a subset of the particles when the
// assignment was kept).
func (ps *Particles) Replace(id string, d Datum) (float64, error) {
	slot, ok := ps.index[id]
	if !ok {
		return 0, fmt.Errorf("%w: %q", ErrUnknownProduct, id)
	}
	old := ps.slots[slot]
	dp := &d
	if ps.cfg.KeepESS > 0 {
		if lp, ok := ps.replaceKeeping(slot, old, dp); ok {
			ps.keptReplaces++
			ps.slots[slot] = dp
			ps.markTouched(slot)
			ps.maybeResample()
			return lp, nil
		}
	}
	nOthers := float64(ps.n - 1)
	// Split the increment in two so that the predictive of the new datum
	// is reported against the weights with the old datum removed.
	rem := make([]float64, len(ps.parts))
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		st.detach(slot, old, src)
		logZOld := st.predictiveTerms(old)
		rem[p] = math.Log(nOthers+st.alpha) - logZOld
		st.drawAux(nil, src)
		logZNew := st.predictiveTerms(dp)
		ps.incr[p] = logZNew - math.Log(nOthers+st.alpha)
		st.place(slot, dp, src)
	})
	ps.redrawnReplaces++
	ps.applyIncrements(rem)
	ps.slots[slot] = dp
	lp := ps.applyIncrements(ps.incr)
	ps.markTouched(slot)
	ps.maybeResample()
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
	logKeep := ps.logMeanExp(ps.incr)
	// NaN (every weight zero) fails the tests too.
	if !(essAfter(ps.logw, ps.incr) >= ps.cfg.KeepESS*ps.ESS() && logKeep >= logRedraw+math.Log(ps.cfg.KeepESS)) {
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

// essAfter returns the effective sample size of the log weights
// logw + incr (logw alone when incr is nil).
func essAfter(logw, incr []float64) float64 {
	at := func(p int) float64 {
		if incr == nil {
			return logw[p]
		}
		return logw[p] + incr[p]
	}
	m := math.Inf(-1)
	for p := range logw {
		m = math.Max(m, at(p))
	}
	var s, s2 float64
	for p := range logw {
		w := math.Exp(at(p) - m)
		s += w
		s2 += w * w
	}
	return s * s / s2
}

// logSumExp returns log sum exp(x) for non-empty x.
func logSumExp(x []float64) float64 {
	m := maxOf(x)
	if math.IsInf(m, 0) {
		return m
	}
	sum := 0.0
	for _, v := range x {
		sum += math.Exp(v - m)
	}
	return m + math.Log(sum)
}

// Remove takes product id out of every particle (a delisting), with
// incremental weight (N - 1 + alpha) / Z(others, datum).
func (ps *Particles) Remove(id string) error {
	slot, ok := ps.index[id]
	if !ok {
		return fmt.Errorf("%w: %q", ErrUnknownProduct, id)
	}
	old := ps.slots[slot]
	nOthers := float64(ps.n - 1)
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		st.detach(slot, old, src)
		ps.incr[p] = math.Log(nOthers+st.alpha) - st.predictiveTerms(old)
		st.n--
	})
	before := ps.ESS()
	ev := ps.logEvidence
	ps.applyIncrements(ps.incr)
	// The removal weight is the reciprocal of a predictive density: when
	// the product had a segment of its own it is heavy-tailed and the ESS
	// collapses. Resampling alone would leave few distinct ancestors, so
	// the particles are resampled and moved over every product and every
	// segment, RefitSweeps times, as at the end of a refit.
	collapsed := ps.ESS() < ps.cfg.ESSFraction*before
	ps.n--
	ps.slots[slot] = nil
	ps.ids[slot] = ""
	delete(ps.index, id)
	ps.free = append(ps.free, slot)
	if ps.isTouch[slot] {
		ps.isTouch[slot] = false
		k := 0
		for _, s := range ps.touched {
			if s != slot {
				ps.touched[k] = s
				k++
			}
		}
		ps.touched = ps.touched[:k]
	}
	if collapsed {
		ps.settle(max(ps.cfg.RefitSweeps, 1), true)
	} else {
		ps.maybeResample()
	}
	// The evidence moves by the forward predictive of the datum given the
	// others, estimated with fresh auxiliaries on the moved particles: an
	// unbiased estimate of p(y | others), without the heavy tail of the
	// reciprocal weights.
	fwd := make([]float64, len(ps.parts))
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		removal, removalKern := st.aux, st.auxKern // keep the removal's auxiliaries for inspection
		st.aux, st.auxKern = nil, nil
		st.drawAux(nil, src)
		fwd[p] = st.predictiveTerms(old) - math.Log(nOthers+st.alpha)
		st.aux, st.auxKern = removal, removalKern
	})
	ps.logEvidence = ev - ps.logMeanExp(fwd)
	return nil
}

// ESS returns the effective sample size 1 / sum(W^2) of the normalised
// weights, in [1, P].
func (ps *Particles) ESS() float64 { return essAfter(ps.logw, nil) }

// Diversity returns the number of distinct ancestors among the particles
// since they were created: path degeneracy shows as a small number.
func (ps *Particles) Diversity() int {
	seen := make(map[int]struct{}, len(ps.origin))
	for _, o := range ps.origin {
		seen[o] = struct{}{}
	}
	return len(seen)
}

// maybeResample resamples when the ESS is below the threshold, then
// reassigns the products touched since the last settle in every particle
// so that duplicated particles diverge again.
func (ps *Particles) maybeResample() bool {
	if ps.ESS() >= ps.cfg.ESSFraction*float64(len(ps.parts)) {
		return false
	}
	ps.resample()
	touched := ps.touched
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		for _, s := range touched {
			st.reassign(s, src)
		}
		st.refreshSmallSegments(touched, src)
		st.updateAlpha(src)
	})
	return true
}

// smallSegment is the largest segment whose kernel is refreshed between
// settles. New segments start with a theta drawn from the base measure;
// refreshing them early lets later products join them instead of opening
// yet more segments, while large segments, whose update costs a pass over
// all their members, wait for the settle.
const smallSegment = 64

// refreshSmallSegments updates the kernel of every segment holding
// one of the touched slots and at most smallSegment members. Which
// segments qualify depends only on the assignments, which the update does
// not change, so the composite move still leaves the posterior invariant.
func (s *State) refreshSmallSegments(touched []int, src *rand.Rand) {
	var pick []uint16
	for _, i := range touched {
		c := s.label(i)
		if c == Absent || s.segs[c].size > smallSegment {
			continue
		}
		dup := false
		for _, q := range pick {
			dup = dup || q == c
		}
		if !dup {
			pick = append(pick, c)
		}
	}
	if len(pick) == 0 {
		return
	}
	sort.Slice(pick, func(a, b int) bool { return pick[a] < pick[b] })
	mem := make([][]int, len(pick))
	for i, c := range s.labels.l {
		for k, q := range pick {
			if c == q {
				mem[k] = append(mem[k], i)
			}
		}
	}
	for k, c := range pick {
		s.updateTheta(c, mem[k], src)
	}
}

// refreshTouchedSegments updates, between refits, the kernel of
// each segment c holding t_c of the touched slots with probability
// min(1, 2 t_c / n_c): a segment whose membership changed a lot is
// always refreshed, a large one that gained a single product rarely, so
// a settle costs in proportion to the changes it absorbs rather than to
// the category's size. The choice depends only on the assignments and
// the touched set, which the update does not change, so each chosen
// update, and the whole move, leaves the posterior invariant.
func (s *State) refreshTouchedSegments(touched []int, mem [][]int, src *rand.Rand) [][]int {
	count := make([]int, len(s.segs))
	for _, i := range touched {
		if c := s.label(i); c != Absent {
			count[c]++
		}
	}
	var pick []uint16
	for c, t := range count {
		if t == 0 {
			continue
		}
		if n := s.segs[c].size; 2*t >= n || src.Float64()*float64(n) < 2*float64(t) {
			pick = append(pick, uint16(c))
		}
	}
	if len(pick) == 0 {
		return mem // no member lists needed: skip the pass over all slots
	}
	mem = s.members(mem)
	for _, c := range pick {
		s.updateTheta(c, mem[c], src)
	}
	return mem
}

// resample draws P ancestors by the configured scheme and resets the
// weights to equal.
func (ps *Particles) resample() {
	P := len(ps.parts)
	w := make([]float64, P)
	mw := maxOf(ps.logw)
	sum := 0.0
	for p, lw := range ps.logw {
		w[p] = math.Exp(lw - mw)
		sum += w[p]
	}
	for p := range w {
		w[p] /= sum
	}
	src := rand.New(ps.master)
	var anc []int
	switch ps.cfg.Resampler {
	case Residual:
		anc = residualResample(w, src)
	default:
		anc = systematicResample(w, src.Float64())
	}
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
	for p := range ps.logw {
		ps.logw[p] = 0
	}
}

// systematicResample returns ancestor indices, ascending, for normalised
// weights w and one uniform u in [0, 1).
func systematicResample(w []float64, u float64) []int {
	P := len(w)
	anc := make([]int, P)
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
	for p := 0; p < P; p++ {
		x := (float64(p) + u) / float64(P)
		for (x >= acc || w[j] == 0) && j < last {
			j++
			acc += w[j]
		}
		anc[p] = j
	}
	return anc
}

// residualResample keeps floor(P w_j) copies of each j and draws the
// remaining ancestors multinomially from the residual weights.
func residualResample(w []float64, src *rand.Rand) []int {
	P := len(w)
	anc := make([]int, 0, P)
	res := make([]float64, P)
	rsum := 0.0
	for j, wj := range w {
		c := int(math.Floor(float64(P) * wj))
		for k := 0; k < c; k++ {
			anc = append(anc, j)
		}
		res[j] = float64(P)*wj - float64(c)
		rsum += res[j]
	}
	for len(anc) < P {
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

// Settle ends a micro-batch: it resamples if the ESS is below the
// threshold and then runs the rejuvenation moves (package doc), all of
// which leave the current posterior invariant, and clears the touched set.
// It reports whether it resampled.
func (ps *Particles) Settle() bool {
	return ps.settle(ps.cfg.Sweeps, false)
}

// SettleRefit ends a refit: a Settle whose rejuvenation makes RefitSweeps
// passes over every product, so that the number of segments and the
// kernels catch up with a whole refit's worth of changes.
func (ps *Particles) SettleRefit() bool {
	return ps.settle(ps.cfg.RefitSweeps, true)
}

// SettleFull is SettleRefit with the given number of passes over every
// product and segment instead of RefitSweeps.
func (ps *Particles) SettleFull(sweeps int) bool {
	return ps.settle(sweeps, true)
}

func (ps *Particles) settle(sweeps int, full bool) bool {
	resampled := false
	if ps.ESS() < ps.cfg.ESSFraction*float64(len(ps.parts)) {
		ps.resample()
		resampled = true
	}
	touched := ps.touched
	if len(ps.kept) != len(ps.parts) {
		ps.kept = make([][]Draw, len(ps.parts))
	}
	keepFrom := sweeps - ps.cfg.KeepSweeps
	// Copies made by a resampling since the last settle share the
	// assignments of the untouched products; a random share of those is
	// moved so that they diverge. Without a resampling the particles are
	// still a weighted sample of the current posterior and only the
	// touched products are moved.
	share := 0.0
	if resampled || ps.resampledSince {
		share = ps.cfg.RandomShare
	}
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		var mem [][]int
		ps.kept[p] = ps.kept[p][:0]
		for s := 0; s < sweeps; s++ {
			for _, i := range touched {
				st.reassign(i, src)
			}
			if full {
				for i, d := range st.data {
					if d != nil && !ps.isTouch[i] {
						st.reassign(i, src)
					}
				}
			} else if share > 0 {
				for i, d := range st.data {
					if d != nil && !ps.isTouch[i] && src.Float64() < share {
						st.reassign(i, src)
					}
				}
			}
			if full {
				mem = st.members(mem)
				for c := range st.segs {
					if st.segs[c].size > 0 {
						st.updateTheta(uint16(c), mem[c], src)
					}
				}
			} else {
				mem = st.refreshTouchedSegments(touched, mem, src)
			}
			st.updateAlpha(src)
			if s >= keepFrom {
				ps.kept[p] = append(ps.kept[p], ps.compactDraw(st, ps.logw[p]))
			}
		}
	})
	ps.keptValid = sweeps > 0
	for _, s := range ps.touched {
		ps.isTouch[s] = false
	}
	ps.touched = ps.touched[:0]
	ps.resampledSince = false
	return resampled
}

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
// each over the touched products plus, after a resampling, a random share
// of the others.
func (ps *Particles) SetRejuvenation(sweeps int, share float64) {
	ps.cfg.Sweeps, ps.cfg.RandomShare = sweeps, share
}

// Draws returns the particles as weighted draws over the present products
// in slot order (the order of Products). Labels are copied.
//
// Right after a settle, each particle contributes the states of its last
// KeepSweeps sweeps, each with the particle's weight; otherwise its
// current state.
func (ps *Particles) Draws() []Draw {
	if ps.keptValid {
		var out []Draw
		for _, k := range ps.kept {
			out = append(out, k...)
		}
		return out
	}
	out := make([]Draw, len(ps.parts))
	for p, st := range ps.parts {
		out[p] = ps.compactDraw(st, ps.logw[p])
	}
	return out
}

// compactDraw exports st over the present products only, labels copied.
func (ps *Particles) compactDraw(st *State, logw float64) Draw {
	d := st.draw(logw)
	lab := make([]uint16, 0, ps.n)
	for s, c := range d.Labels {
		if ps.slots[s] != nil {
			lab = append(lab, c)
		}
	}
	d.Labels = lab
	return d
}

// Summary returns the posterior summaries of the present products (in the
// order of Products) over the particles' draws: what a settle hands to
// its caller.
func (ps *Particles) Summary(opt SummaryOptions) (Summary, error) {
	return Summarize(ps.Draws(), ps.Data(), opt)
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
