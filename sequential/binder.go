package sequential

import (
	"math"
	"slices"
	"sort"
)

// This file holds the point partition: the start from the best draw and
// the local search that minimises the expected Binder loss, which keeps
// for every merged draw the sparse contingency rows against the
// candidate, so that moving one product costs a pass over its draws'
// rows rather than over all pairs.

// pointPartition runs the search of PointPartition, from the best of the
// merged partitions and over the pair probabilities of pairs (pairParts),
// and returns the partition in canonical numbering.
func pointPartition(merged, pairs []*drawPartition, maxSweeps int) []int {
	best := bestDrawPartition(merged)
	s := newBinderSearch(pairs, slices.Clone(merged[best].z), merged[best].k)
	s.improve(maxSweeps)
	return canonicalPartition(s.z)
}

// bestDrawPartition returns the index of the merged partition whose
// expected Binder loss is least. The loss of partition u is
// sum_v w_v pairs_v + pairs_u - 2 sum_v w_v agree(u, v); agree is
// symmetric, so each unordered pair of partitions is counted once.
func bestDrawPartition(parts []*drawPartition) int {
	n := len(parts[0].z)
	cnt := make([]int32, n+1)
	acc := make([]float64, len(parts))
	var base, wsum float64
	for _, p := range parts {
		base += p.w * float64(p.pairs)
		wsum += p.w
	}
	var table []int32
	for u, pu := range parts {
		for v := u; v < len(parts); v++ {
			pv := parts[v]
			if pu.w == 0 && pv.w == 0 {
				continue
			}
			var a float64
			if cells := pu.k * pv.k; cells <= denseTableCells {
				// Few segments: count the contingency table directly,
				// reading both label vectors in order.
				if len(table) < cells {
					table = make([]int32, denseTableCells)
				}
				a = float64(agreeDense(pu.z, pv.z, pv.k, table[:cells]))
			} else {
				a = float64(agreePairs(pu.order, pu.start, pv.z, cnt))
			}
			acc[u] += pv.w * a
			if v != u {
				acc[v] += pu.w * a
			}
		}
	}
	best, bestLoss := 0, math.Inf(1)
	for u, p := range parts {
		loss := base/wsum + float64(p.pairs) - 2*acc[u]/wsum
		if loss < bestLoss {
			best, bestLoss = u, loss
		}
	}
	return best
}

// denseTableCells bounds the contingency tables that bestDrawPartition
// counts in a dense array (16 KiB, inside a first-level cache).
const denseTableCells = 4096

// agreeDense returns sum_kl C(n_kl, 2) for two label vectors with kb
// labels in b, counting n_kl in table (len >= ka*kb, zero on entry and on
// return).
func agreeDense(a, b []int32, kb int, table []int32) int64 {
	for i, x := range a {
		table[int(x)*kb+int(b[i])]++
	}
	var s int64
	for c, m := range table {
		s += int64(m) * int64(m-1) / 2
		table[c] = 0
	}
	return s
}

// canonicalPartition renumbers segments 0..K-1 by size descending, then
// by smallest member index.
func canonicalPartition(z []int32) []int {
	type seg struct {
		name, size, first int
	}
	idx := make(map[int32]int)
	var segs []seg
	for i, c := range z {
		x, ok := idx[c]
		if !ok {
			x = len(segs)
			idx[c] = x
			segs = append(segs, seg{name: x, first: i})
		}
		segs[x].size++
	}
	sort.Slice(segs, func(a, b int) bool {
		if segs[a].size != segs[b].size {
			return segs[a].size > segs[b].size
		}
		return segs[a].first < segs[b].first
	})
	rank := make([]int, len(segs))
	for r, s := range segs {
		rank[s.name] = r
	}
	out := make([]int, len(z))
	for i, c := range z {
		out[i] = rank[idx[c]]
	}
	return out
}

// cell is one non-zero entry n_kl of a draw's contingency table against
// the point partition: count products of draw segment k in point slot seg.
type cell struct {
	seg, count int32
}

// binderSearch holds the point partition being improved and, for every
// merged draw v and each of its segments k, the sparse row of counts
// n^v_{k,l} over point slots l. A row has at most min(K, n^v_k) cells, so
// the tables together hold at most N cells per draw.
type binderSearch struct {
	parts  []*drawPartition // those with positive weight
	wsum   float64
	z      []int32 // point slot of each product
	size   []int32 // members per slot; 0 marks a free slot
	free   []int32
	rowOff []int // rows of parts[v] begin at rowOff[v]
	rows   [][]cell
	aff    []float64 // scratch: see affinity

	// For parts with placement probabilities, drows (laid out as rows)
	// hold the corrections that turn the labels after the scan into the
	// labels at product i's update: +1 at (label before, slot) and -1 at
	// (label after, slot) for each mover not yet passed (product > i).
	// cursor[v] is the next mover of part v to pass. See beginScan.
	drows  [][]cell
	cursor []int
}

func newBinderSearch(all []*drawPartition, z []int32, k int) *binderSearch {
	s := &binderSearch{z: z, size: make([]int32, k), aff: make([]float64, k)}
	for _, p := range all {
		if p.w > 0 {
			s.parts = append(s.parts, p)
			s.wsum += p.w
		}
	}
	for _, c := range z {
		s.size[c]++
	}
	s.rowOff = make([]int, len(s.parts)+1)
	for v, p := range s.parts {
		s.rowOff[v+1] = s.rowOff[v] + p.k
	}
	s.rows = make([][]cell, s.rowOff[len(s.parts)])
	if hasSoft(s.parts) {
		s.drows = make([][]cell, len(s.rows))
		s.cursor = make([]int, len(s.parts))
	}
	dense := make([]int32, k)
	var touched []int32
	for v, p := range s.parts {
		for c := 0; c < p.k; c++ {
			for _, i := range p.members(c) {
				l := z[i]
				if dense[l] == 0 {
					touched = append(touched, l)
				}
				dense[l]++
			}
			row := make([]cell, len(touched))
			for x, l := range touched {
				row[x] = cell{seg: l, count: dense[l]}
				dense[l] = 0
			}
			touched = touched[:0]
			s.rows[s.rowOff[v]+c] = row
		}
	}
	return s
}

// affinity fills s.aff for product i: aff[l]/wsum is the sum over the
// members j != i of slot l of P(i and j share a segment). For a part with
// placement probabilities that is sum_k p_i(k) times the number of
// products in slot l whose label was k at i's update (rows plus the
// mover corrections, so enter(i) must have been called); for the others,
// the members of i's own segment. i itself is taken out.
func (s *binderSearch) affinity(i int) {
	clear(s.aff)
	for v, p := range s.parts {
		if p.soft == nil {
			for _, c := range s.rows[s.rowOff[v]+int(p.z[i])] {
				s.aff[c.seg] += p.w * float64(c.count)
			}
			s.aff[s.z[i]] -= p.w
			continue
		}
		sp := p.soft
		for e := sp.off[i]; e < sp.off[i+1]; e++ {
			k, wp := int(sp.seg[e]), p.w*sp.p[e]
			for _, c := range s.rows[s.rowOff[v]+k] {
				s.aff[c.seg] += wp * float64(c.count)
			}
			for _, c := range s.drows[s.rowOff[v]+k] {
				s.aff[c.seg] += wp * float64(c.count)
			}
			if int32(k) == p.z[i] {
				s.aff[s.z[i]] -= wp
			}
		}
	}
}

// beginScan starts a pass over the products in ascending order: every
// mover's correction is put in place (each has not been passed yet).
func (s *binderSearch) beginScan() {
	if s.drows == nil {
		return
	}
	for v, p := range s.parts {
		if p.soft == nil {
			continue
		}
		for c := 0; c < p.k; c++ {
			s.drows[s.rowOff[v]+c] = s.drows[s.rowOff[v]+c][:0]
		}
		for _, m := range p.soft.movers {
			s.moverCorrection(v, m, 1)
		}
		s.cursor[v] = 0
	}
}

// enter passes product i (ascending, after beginScan): from i's update
// on, its own label is the one after the scan.
func (s *binderSearch) enter(i int) {
	if s.drows == nil {
		return
	}
	for v, p := range s.parts {
		if p.soft == nil {
			continue
		}
		mv := p.soft.movers
		for s.cursor[v] < len(mv) && int(mv[s.cursor[v]].i) <= i {
			s.moverCorrection(v, mv[s.cursor[v]], -1)
			s.cursor[v]++
		}
	}
}

// moverCorrection adds sign times mover m's correction to part v's drows.
func (s *binderSearch) moverCorrection(v int, m softMover, sign int32) {
	l := s.z[m.i]
	cellAdd(&s.drows[s.rowOff[v]+int(m.from)], l, sign)
	cellAdd(&s.drows[s.rowOff[v]+int(m.to)], l, -sign)
}

// cellAdd adds delta to the cell of seg in row, dropping cells that reach
// zero; counts may be negative. It reports whether the cell was there.
func cellAdd(row *[]cell, seg, delta int32) bool {
	r := *row
	for x := range r {
		if r[x].seg == seg {
			r[x].count += delta
			if r[x].count == 0 {
				r[x] = r[len(r)-1]
				*row = r[:len(r)-1]
			}
			return true
		}
	}
	*row = append(r, cell{seg: seg, count: delta})
	return false
}

// improve sweeps the products until no single move lowers the expected
// loss or maxSweeps sweeps are done.
func (s *binderSearch) improve(maxSweeps int) {
	for sweep := 0; sweep < maxSweeps; sweep++ {
		moved := false
		s.beginScan()
		for i := range s.z {
			s.enter(i)
			if s.tryMove(i) {
				moved = true
			}
		}
		if !moved {
			return
		}
	}
}

// tryMove moves product i to the slot (or new singleton) that lowers the
// expected loss most, if any does by more than rounding could explain.
// With q_l = sum_{j in l, j != i} P(i ~ j), moving i from slot f to slot
// l changes the loss by (m_l - (m_f - 1)) - 2 (q_l - q_f): each pair
// gained costs 1 - 2P and each pair lost saves it. With placement
// probabilities, P(i ~ j) is read from i's own update only (the
// affinity); the loss reported at the end counts both ends of each pair.
func (s *binderSearch) tryMove(i int) bool {
	from := s.z[i]
	s.affinity(i)
	mFrom := float64(s.size[from])
	qFrom := s.aff[from] / s.wsum
	const newSlot = -2
	best, bestDelta := int32(-1), 0.0
	for l, m := range s.size {
		if m == 0 || int32(l) == from {
			continue
		}
		delta := float64(m) - (mFrom - 1) - 2*(s.aff[l]/s.wsum-qFrom)
		if delta < -moveTolerance(mFrom, float64(m)) && delta < bestDelta {
			best, bestDelta = int32(l), delta
		}
	}
	if mFrom > 1 {
		delta := -(mFrom - 1) + 2*qFrom
		if delta < -moveTolerance(mFrom, 0) && delta < bestDelta {
			best = newSlot
		}
	}
	if best == -1 {
		return false
	}
	if best == newSlot {
		best = s.newSlot()
	}
	s.move(i, best)
	return true
}

// moveTolerance is the least improvement a move must make, so that moves
// justified only by rounding in the weighted sums (relative error about
// 1e-16 times the number of draws) cannot cycle.
func moveTolerance(mFrom, mTo float64) float64 { return 1e-12 * (1 + mFrom + mTo) }

func (s *binderSearch) newSlot() int32 {
	if n := len(s.free); n > 0 {
		l := s.free[n-1]
		s.free = s.free[:n-1]
		return l
	}
	s.size = append(s.size, 0)
	s.aff = append(s.aff, 0)
	return int32(len(s.size) - 1)
}

func (s *binderSearch) move(i int, to int32) {
	from := s.z[i]
	for v, p := range s.parts {
		row := &s.rows[s.rowOff[v]+int(p.z[i])]
		rowAdd(row, from, -1)
		rowAdd(row, to, 1)
	}
	s.size[from]--
	s.size[to]++
	s.z[i] = to
	if s.size[from] == 0 {
		s.free = append(s.free, from)
	}
}

// rowAdd is cellAdd for the rows of the point partition, whose counts
// never fall below zero.
func rowAdd(row *[]cell, seg, delta int32) {
	if !cellAdd(row, seg, delta) && delta < 0 {
		panic("sequential: internal error: contingency count below zero")
	}
}
