package sequential

import "math/rand/v2"

// Soft holds what one sweep's scan learned about a kept state beyond its
// labels: for each product, the Algorithm-8 probabilities with which its
// update placed it in each existing segment, given every other product's
// label at that moment. Summaries average these instead of 0/1 labels
// (Rao-Blackwellisation; package doc).
//
// The scan updates the products in ascending order, so at product i's
// update product j's label was its label after the scan (Draw.Labels)
// when j < i, and its label before the scan when j > i; the two differ
// only for the few products that the scan moved, listed in Movers.
// Segment indices are those of Draw.Labels and Draw.Segments. A Soft is
// read-only once built.
type Soft struct {
	// Off[i] to Off[i+1] index product i's entries of Seg and P: P[e] is
	// the probability that the update placed product i in segment Seg[e].
	// Entries below SoftFloor are left out, as are new segments.
	Off []uint32
	Seg []uint16
	P   []float32
	// Movers lists, by ascending product, the products whose label the
	// scan changed, with the label each had before.
	Movers []Mover
}

// Mover is a product that a scan moved, with its segment before the scan.
type Mover struct {
	Product uint32
	From    uint16
}

// SoftFloor is the smallest placement probability a Soft keeps: a
// co-segment or membership estimate is low by less than SoftFloor for
// each one left out. Most products keep one to three entries.
const SoftFloor = 1e-4

// entries returns product i's segments and probabilities.
func (s *Soft) entries(i int) ([]uint16, []float32) {
	return s.Seg[s.Off[i]:s.Off[i+1]], s.P[s.Off[i]:s.Off[i+1]]
}

// placement returns the probability with which product i's update placed
// it in segment c (0 when below SoftFloor or not recorded).
func (s *Soft) placement(i int, c uint16) float64 {
	seg, p := s.entries(i)
	for e, x := range seg {
		if x == c {
			return float64(p[e])
		}
	}
	return 0
}

// startLabels returns each product's label before the scan, given the
// labels after it.
func (s *Soft) startLabels(end []uint16) []uint16 {
	out := append([]uint16(nil), end...)
	for _, m := range s.Movers {
		out[m.Product] = m.From
	}
	return out
}

// reset empties the Soft for a scan over slots slots, reusing its storage.
func (s *Soft) reset(slots int) {
	if cap(s.Off) < slots+1 {
		s.Off = make([]uint32, slots+1)
	}
	s.Off = s.Off[:slots+1]
	s.Off[0] = 0
	s.Seg, s.P, s.Movers = s.Seg[:0], s.P[:0], s.Movers[:0]
}

// scan reassigns every present product once, in ascending slot order
// (Algorithm 8). With soft non-nil it records the placement
// probabilities and the moves into it, by slot.
func (s *State) scan(src *rand.Rand, soft *Soft) {
	if soft == nil {
		for i, d := range s.data {
			if d != nil {
				s.reassign(i, src)
			}
		}
		return
	}
	soft.reset(len(s.data))
	for i, d := range s.data {
		if d != nil {
			from := s.label(i)
			s.detach(i, d, src)
			s.predictiveTerms(d)
			inv := 1 / s.probSum
			for x, c := range s.cand {
				if c == Absent {
					continue
				}
				if p := s.prob[x] * inv; p >= SoftFloor {
					soft.Seg = append(soft.Seg, c)
					soft.P = append(soft.P, float32(p))
				}
			}
			s.place(i, d, src)
			if s.label(i) != from {
				soft.Movers = append(soft.Movers, Mover{Product: uint32(i), From: from})
			}
		}
		soft.Off[i+1] = uint32(len(soft.Seg))
	}
}

// compact returns the Soft over the present slots only (present[slot]
// true), renumbered as the present products in slot order.
func (s *Soft) compact(present func(int) bool, n int) *Soft {
	out := &Soft{Off: make([]uint32, 1, n+1)}
	index := make([]uint32, len(s.Off)-1)
	k := uint32(0)
	for i := 0; i+1 < len(s.Off); i++ {
		if !present(i) {
			continue
		}
		index[i] = k
		k++
		seg, p := s.entries(i)
		out.Seg = append(out.Seg, seg...)
		out.P = append(out.P, p...)
		out.Off = append(out.Off, uint32(len(out.Seg)))
	}
	for _, m := range s.Movers {
		if present(int(m.Product)) {
			out.Movers = append(out.Movers, Mover{Product: index[m.Product], From: m.From})
		}
	}
	return out
}

// clone returns a copy that owns its storage.
func (s *Soft) clone() *Soft {
	return &Soft{Off: append([]uint32(nil), s.Off...), Seg: append([]uint16(nil), s.Seg...),
		P: append([]float32(nil), s.P...), Movers: append([]Mover(nil), s.Movers...)}
}
