package synth

import "math/rand/v2"

// Sequence draws a run of weekly refits of one category. By default every
// refit redraws each product's latent vector from its segment (a refit
// that shares nothing with the previous one: the hardest case for an
// updater). With Drift > 0 a refit re-estimates the same competitors
// instead (Perturb): what a weekly refit on one more week of sales mostly
// looks like. Either way, at refit SwitchAt a chosen share of products
// moves to another segment for good and is drawn afresh from it.
type Sequence struct {
	// Drift is the standard deviation of the log-scale estimation noise of
	// a re-estimating refit; 0 (the default) redraws every product.
	Drift float64
	// Hazard, when > 0, makes every product switch to another segment
	// (drawn afresh from it) with this probability at every refit after
	// the first, besides the planted switches at SwitchAt: a constant
	// switch rate, as the switch filter of package alerts assumes.
	Hazard float64

	cfg      Config
	products []Product
	src      *rand.Rand
	// SwitchAt is the 0-based refit at which switching products move
	// (refits/2); Switched marks them.
	SwitchAt int
	Switched []bool
	next     int
}

// NewSequence draws the category and picks round(share * products)
// products to switch segment at refit refits/2.
func NewSequence(cfg Config, refits int, share float64, src *rand.Rand) *Sequence {
	s := &Sequence{cfg: cfg, src: src, SwitchAt: refits / 2}
	s.products = Generate(cfg, src)
	s.Switched = make([]bool, len(s.products))
	k := int(share*float64(len(s.products)) + 0.5)
	for _, i := range src.Perm(len(s.products))[:k] {
		s.Switched[i] = true
	}
	return s
}

// Refit returns the products as of refit r (0-based). Refits must be
// asked for in order; the first call returns the initial draw. The
// returned slice is owned by the Sequence and changes on the next call.
func (s *Sequence) Refit(r int) []Product {
	if r != s.next {
		panic("synth: Sequence.Refit called out of order")
	}
	s.next++
	if r == 0 {
		return s.products
	}
	nseg := len(s.cfg.Segments)
	for i := range s.products {
		p := &s.products[i]
		if s.Hazard > 0 && nseg > 1 && s.src.Float64() < s.Hazard {
			p.Segment = (p.Segment + 1 + s.src.IntN(nseg-1)) % nseg
			Redraw(s.cfg, p, s.src)
			continue
		}
		if r == s.SwitchAt && s.Switched[i] && nseg > 1 {
			p.Segment = (p.Segment + 1 + s.src.IntN(nseg-1)) % nseg
			Redraw(s.cfg, p, s.src)
			continue
		}
		if s.Drift > 0 {
			Perturb(p, s.Drift, s.src)
		} else {
			Redraw(s.cfg, p, s.src)
		}
	}
	return s.products
}
