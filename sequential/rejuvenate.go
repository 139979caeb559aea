package sequential

import (
	"math"
	"math/rand/v2"
	"slices"
	"sort"
)

// This file holds the moves that keep the population healthy: the cheap
// settle after a micro-batch of changes, the first build from batch
// chains, the waste-free step at a refit's end, and the diversity watch
// that triggers a waste-free step in between.

// StepReport describes the last waste-free step or build.
type StepReport struct {
	// Seq numbers the builds and waste-free steps since this system was
	// created or decoded (1 for the first).
	Seq uint64
	// Chains and Steps: M chains of about L = P/M MCMC steps each, after
	// Burn steps each whose states were not kept.
	Chains, Steps, Burn int
	// Moved is the ESS share that the change since the previous step
	// left, resamplings included (1: the target did not move).
	Moved float64
	// Distinct is the number of distinct partitions in the population
	// after the step.
	Distinct int
}

// LastStep returns the report of the last build or waste-free step since
// this system was created or decoded.
func (ps *Particles) LastStep() StepReport { return ps.lastStep }

// maybeResample resamples when the ESS is below the threshold, then
// reassigns the product just changed (slot; -1 for none) in every
// particle, refreshes the small segments it touches and alpha, so that
// duplicated particles begin to diverge. (Reassigning every product
// changed since the last settle after each resampling, as the first
// design did, cost most of a sweep per particle every few changes of a
// whole refit; the settles and the refit-end step move them all anyway.)
func (ps *Particles) maybeResample(slot int) bool {
	if ps.ESS() >= ps.cfg.ESSFraction*float64(len(ps.parts)) {
		return false
	}
	ps.resample()
	var moved []int
	if slot >= 0 {
		moved = []int{slot}
	}
	ps.forEach(func(p int, st *State, src *rand.Rand) {
		for _, s := range moved {
			st.reassign(s, src)
		}
		st.refreshSmallSegments(moved, src)
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
		if !slices.Contains(pick, c) {
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

// Settle ends a micro-batch of changes: it resamples if the ESS is below
// the threshold and then runs Sweeps passes over the changed products
// (and, after a resampling, a random share of the others), all moves
// that leave the current posterior invariant, and clears the changed
// set. Passes that would cost a full sweep per particle or more are
// skipped: a waste-free step costs that and moves everything. After a
// small batch (single changes between refits) the population is then
// watched: when the changes since the last waste-free step have left an
// ESS share below RenewBelow, or fewer than DiversityFloor * P of the
// states are distinct partitions, it runs a waste-free step. Only a
// resampling makes copies, so distinct states are counted only at a
// settle that follows one (counting at every single change cost as much
// as the settle's own moves); the rule depends on saved state alone, so
// a decoded system decides as the original would. After a
// large batch (a refit in progress) it renews nothing: copies are
// expected, and the refit's end (SettleRefit) runs a waste-free step
// that starts from the weights as the whole refit left them, so a
// renewal in between would only be paid for twice. In a large category
// a micro-batch is small however many refit changes follow, so a caller
// that knows a refit is open calls SettleInRefit instead. Settle reports
// whether it resampled or renewed. Before the first build it does nothing.
func (ps *Particles) Settle() bool { return ps.settleWatch(true) }

// SettleInRefit ends a micro-batch of a refit still in progress: it
// resamples if the ESS is below the threshold and clears the changed set,
// with neither the passes of Settle nor its watch. The refit's end
// (SettleRefit) runs a waste-free step that moves every product, kernel
// and alpha, so moves made in between would be paid for twice: in a
// 5,000-product refit they were half the refit's cost.
func (ps *Particles) SettleInRefit() bool { return ps.settleWatch(false) }

func (ps *Particles) settleWatch(watch bool) bool {
	if !ps.built {
		return false
	}
	sweeps := ps.cfg.Sweeps
	if !watch {
		sweeps = 0
	}
	large := !watch || float64(sweeps*len(ps.touched)) >= float64(ps.n)
	copied := ps.resampledSince
	resampled := ps.settle(sweeps)
	copied = copied || resampled
	if ps.n >= 2 && !large && (ps.movedShare() < ps.cfg.RenewBelow ||
		copied && ps.cfg.DiversityFloor > 0 && float64(ps.DistinctStates()) < ps.cfg.DiversityFloor*float64(len(ps.parts))) {
		ps.wasteFree()
		return true
	}
	return resampled
}

// movedShare is the ESS share that the changes since the last waste-free
// step have left, the resamplings in between multiplied in: 1 when the
// target has not moved.
func (ps *Particles) movedShare() float64 {
	return math.Exp(ps.logMoved) * ps.ESS() / float64(len(ps.parts))
}

func (ps *Particles) settle(sweeps int) bool {
	resampled := false
	if ps.ESS() < ps.cfg.ESSFraction*float64(len(ps.parts)) {
		ps.resample()
		resampled = true
	}
	touched := ps.touched
	// Copies made by a resampling since the last settle share the
	// assignments of the untouched products; a random share of those is
	// moved so that they diverge. Without a resampling the particles are
	// still a weighted sample of the current posterior and only the
	// touched products are moved.
	share := 0.0
	if resampled || ps.resampledSince {
		share = ps.cfg.RandomShare
	}
	// A batch so large that its passes would cost a full sweep per
	// particle or more is left to a waste-free step (the refit end's, or
	// the watch's), which costs one sweep per particle and moves every
	// product, kernel and alpha.
	large := float64(sweeps)*(float64(len(touched))+share*float64(ps.n)) >= float64(ps.n)
	if sweeps > 0 && (len(touched) > 0 || share > 0) && !large {
		ps.forEach(func(p int, st *State, src *rand.Rand) {
			var mem [][]int
			for s := 0; s < sweeps; s++ {
				for _, i := range touched {
					st.reassign(i, src)
				}
				if share > 0 {
					for i, d := range st.data {
						if d != nil && !ps.isTouch[i] && src.Float64() < share {
							st.reassign(i, src)
						}
					}
				}
				mem = st.refreshTouchedSegments(touched, mem, src)
				st.updateAlpha(src)
			}
		})
	}
	for _, s := range ps.touched {
		ps.isTouch[s] = false
	}
	ps.touched = ps.touched[:0]
	ps.resampledSince = false
	return resampled
}

// SettleRefit ends a refit: before the first build it builds the
// population (Build); after it, it runs a waste-free step, which moves
// every product, kernel and alpha. It reports whether the population was
// made anew (always, once there are products).
func (ps *Particles) SettleRefit() bool {
	if !ps.built {
		ps.Build()
		return ps.n > 0
	}
	if ps.n == 0 {
		return false
	}
	ps.wasteFree()
	return true
}

// chainSeeds returns two words from the master generator; chain c of the
// next build or waste-free step seeds its stream with them and c, so
// results depend on neither the number of workers nor scheduling.
func (ps *Particles) chainSeeds() (uint64, uint64) { return ps.master.Uint64(), ps.master.Uint64() }

func chainStream(k1, k2 uint64, c int) *rand.Rand {
	return rand.New(rand.NewPCG(k1, k2^(uint64(c)+1)*0x9e3779b97f4a7c15))
}

// mcmcStep is one MCMC step of the builds and the waste-free steps: the
// split-merge proposals, a scan of every product (recording placement
// probabilities into soft when it is not nil), every segment's kernel,
// then alpha. It leaves the current posterior invariant.
func (st *State) mcmcStep(splitMerge float64, src *rand.Rand, soft *Soft, mem [][]int) (MoveStats, [][]int) {
	m := st.splitMergeMoves(splitMerge, src)
	st.scan(src, soft)
	return m, st.updateKernelsAndAlpha(mem, src)
}

// chainLayout splits P states over M chains: chain c holds L_c = P/M
// states (one more for the first P mod M chains), at population indices
// offset[c] to offset[c+1]-1.
func chainLayout(P, M int) (lens, offset []int) {
	lens, offset = make([]int, M), make([]int, M+1)
	for c := range lens {
		lens[c] = P / M
		if c < P%M {
			lens[c]++
		}
		offset[c+1] = offset[c] + lens[c]
	}
	return lens, offset
}

// buildThin is the thinning of the build's chains: every buildThin-th
// state after burn-in joins the first population. Consecutive states of
// a chain share most of their partition; keeping every second spreads
// the population over twice the run for the same number of states.
const buildThin = 2

// Build makes the first population from batch chains (package doc,
// "First population"): BuildChains chains over the products present, each
// from all products in one segment, BuildBurn sweeps of burn-in and then
// its share of the P states, one every buildThin MCMC steps. Every state
// has weight 1.
// A system built with no products starts from P empty states and takes
// its products one Add at a time.
func (ps *Particles) Build() {
	ps.built = true
	ps.logMoved = 0
	for _, s := range ps.touched {
		ps.isTouch[s] = false
	}
	ps.touched = ps.touched[:0]
	ps.resampledSince = false
	if ps.n == 0 {
		return
	}
	P := len(ps.parts)
	M := min(ps.cfg.BuildChains, P)
	lens, offset := chainLayout(P, M)
	k1, k2 := ps.chainSeeds()
	pop, soft, moves := make([]*State, P), make([]*Soft, P), make([]MoveStats, M)
	parallelFor(ps.cfg.Workers, M, func(c int) {
		src := chainStream(k1, k2, c)
		st := newState(&ps.prior, ps.cfg.Aux, len(ps.slots), ps.prior.DrawAlpha(src))
		st.data = ps.slots
		seg := st.newSegment(ps.prior.DrawTheta(src))
		for i, d := range ps.slots {
			if d != nil {
				st.n++
				st.join(i, d, seg)
			}
		}
		var mem [][]int
		var m MoveStats
		for s := 0; s < ps.cfg.BuildBurn; s++ {
			m, mem = st.mcmcStep(ps.cfg.SplitMerge, src, nil, mem)
			moves[c] = moves[c].Add(m)
		}
		moves[c] = moves[c].Add(ps.runChain(st, offset[c], lens[c], buildThin, src, pop, soft, &mem))
	})
	origin := make([]int, P)
	for p := range origin {
		origin[p] = p
	}
	ps.install(pop, soft, origin)
	for _, m := range moves {
		ps.moves = ps.moves.Add(m)
	}
	ps.lastStep = StepReport{Seq: ps.lastStep.Seq + 1, Chains: M, Steps: lens[0], Moved: 0, Distinct: ps.DistinctStates()}
}

// runChain advances st by steps times thin MCMC steps, storing every
// thin-th state reached at pop[offset+t] (with its placement record in
// soft when recording). st itself ends as the last state.
func (ps *Particles) runChain(st *State, offset, steps, thin int, src *rand.Rand, pop []*State, soft []*Soft, mem *[][]int) MoveStats {
	var total MoveStats
	for t := 0; t < steps; t++ {
		var m MoveStats
		for k := 1; k < thin; k++ {
			m, *mem = st.mcmcStep(ps.cfg.SplitMerge, src, nil, *mem)
			total = total.Add(m)
		}
		var rec *Soft
		if ps.cfg.RaoBlackwell {
			rec = &Soft{}
		}
		m, *mem = st.mcmcStep(ps.cfg.SplitMerge, src, rec, *mem)
		total = total.Add(m)
		pop[offset+t] = st
		soft[offset+t] = rec
		if t+1 < steps {
			st = st.clone()
		}
	}
	return total
}

// install makes pop the population with equal weights and the given
// ancestors (see Diversity).
func (ps *Particles) install(pop []*State, soft []*Soft, origin []int) {
	for _, st := range ps.parts {
		st.release()
	}
	ps.parts = pop
	ps.origin = origin
	for p := range ps.logw {
		ps.logw[p] = 0
	}
	ps.soft = nil
	if ps.cfg.RaoBlackwell {
		ps.soft = soft
	}
	for _, s := range ps.touched {
		ps.isTouch[s] = false
	}
	ps.touched = ps.touched[:0]
	ps.resampledSince = false
	ps.logMoved = 0
}

// wasteFree runs one waste-free step (Dau and Chopin 2022; package doc):
// it resamples M of the P particles and runs each through a chain of
// about P/M MCMC steps, every state of which joins the new population
// with weight 1. M follows how far the target has moved since the last
// step: P times the ESS share left by the changes (resamplings counted),
// at least MinChains; a small re-estimate leaves the share near 1 and
// many short chains, a redraw of every product a share near 0 and
// MinChains long chains.
func (ps *Particles) wasteFree() {
	P := len(ps.parts)
	moved := ps.movedShare()
	M := min(P, max(ps.cfg.MinChains, int(math.Round(float64(P)*moved))))
	anc := ancestors(ps.cfg.Resampler, normalised(ps.logw), M, rand.New(ps.master))
	lens, offset := chainLayout(P, M)
	k1, k2 := ps.chainSeeds()
	pop, soft, moves := make([]*State, P), make([]*Soft, P), make([]MoveStats, M)
	chainOf := make([]int, P)
	for c := range lens {
		for p := offset[c]; p < offset[c+1]; p++ {
			chainOf[p] = c
		}
	}
	burn := ps.stepBurn(moved)
	parallelFor(ps.cfg.Workers, M, func(c int) {
		src := chainStream(k1, k2, c)
		var mem [][]int
		st := ps.parts[anc[c]].clone()
		for s := 0; s < burn; s++ {
			var m MoveStats
			m, mem = st.mcmcStep(ps.cfg.SplitMerge, src, nil, mem)
			moves[c] = moves[c].Add(m)
		}
		moves[c] = moves[c].Add(ps.runChain(st, offset[c], lens[c], 1, src, pop, soft, &mem))
	})
	origin := make([]int, P)
	for p := range origin {
		origin[p] = ps.origin[anc[chainOf[p]]]
	}
	ps.install(pop, soft, origin)
	for _, m := range moves {
		ps.moves = ps.moves.Add(m)
	}
	ps.lastStep = StepReport{Seq: ps.lastStep.Seq + 1, Chains: M, Steps: lens[0], Burn: burn, Moved: moved, Distinct: ps.DistinctStates()}
}

// stepBurn is how many MCMC steps each chain of a waste-free step runs
// before its states join the population: none while the changes have
// left an ESS share of at least RenewBelow, rising on a log scale to
// RefitBurn when they have left a single effective particle (share 1/P).
// Once the weights have collapsed the M resampled particles are copies of
// one or two states of the old posterior, and the chains first need steps
// to move away from them.
func (ps *Particles) stepBurn(moved float64) int {
	P := float64(len(ps.parts))
	lo := ps.cfg.RenewBelow
	if !(moved < lo) || ps.cfg.RefitBurn == 0 || lo*P <= 1 {
		return 0
	}
	f := math.Log(lo/math.Max(moved, 1/P)) / math.Log(lo*P)
	return int(math.Round(float64(ps.cfg.RefitBurn) * math.Min(f, 1)))
}

// Diversity returns the number of distinct ancestors among the particles
// since the last build: path degeneracy shows as a small number.
func (ps *Particles) Diversity() int {
	seen := make(map[int]struct{}, len(ps.origin))
	for _, o := range ps.origin {
		seen[o] = struct{}{}
	}
	return len(seen)
}

// DistinctStates returns the number of distinct partitions of the present
// products in the population (states that differ only in kernels or
// alpha count once). Resampling makes copies; the diversity watch of
// Settle runs a waste-free step when too few states remain distinct.
func (ps *Particles) DistinctStates() int {
	P := len(ps.parts)
	keys := make([][]int32, P)
	hashes := make([]uint64, P)
	parallelFor(ps.cfg.Workers, P, func(p int) {
		st := ps.parts[p]
		// Labels index st.segs; rename[l]-1 is l's rank of first
		// appearance (0: not seen yet), so equal partitions get equal keys.
		rename := make([]int32, len(st.segs))
		next := int32(0)
		z := make([]int32, 0, ps.n)
		for s, l := range st.labels.l {
			if ps.slots[s] == nil {
				continue
			}
			if rename[l] == 0 {
				next++
				rename[l] = next
			}
			z = append(z, rename[l]-1)
		}
		keys[p] = z
		hashes[p] = hashLabels(z)
	})
	seen := map[uint64][]int{}
	distinct := 0
	for p, h := range hashes {
		dup := false
		for _, q := range seen[h] {
			if slices.Equal(keys[p], keys[q]) {
				dup = true
				break
			}
		}
		if !dup {
			seen[h] = append(seen[h], p)
			distinct++
		}
	}
	return distinct
}

// Draws returns the particles as weighted draws over the present products
// in slot order (the order of Products). Labels are copied. Right after a
// build or waste-free step each carries the placement record of the scan
// that made it (Draw.Soft); after any later change the records are
// stale and left out.
func (ps *Particles) Draws() []Draw {
	out := make([]Draw, len(ps.parts))
	present := func(s int) bool { return ps.slots[s] != nil }
	for p, st := range ps.parts {
		out[p] = ps.compactDraw(st, ps.logw[p])
		if ps.soft != nil && ps.soft[p] != nil {
			out[p].Soft = ps.soft[p].compact(present, ps.n)
		}
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
// order of Products) over the particles' draws.
func (ps *Particles) Summary(opt SummaryOptions) (Summary, error) {
	return Summarize(ps.Draws(), ps.Data(), opt)
}
