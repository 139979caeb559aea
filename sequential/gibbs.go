package sequential

import (
	"errors"
	"fmt"
	"math/rand/v2"
)

// GibbsConfig sets up the batch sampler.
type GibbsConfig struct {
	Prior Prior
	// Aux is the number m of auxiliary segments drawn from the base
	// measure for each reassignment (Neal 2000, Algorithm 8); >= 1.
	Aux int
	// Sweeps is the total number of sweeps, Burn of them discarded;
	// every Thin-th sweep after burn-in is kept as a draw.
	Sweeps, Burn, Thin int
	// SplitMerge is the number of split-merge proposals per sweep
	// (package doc); a fractional part is the chance of one more. >= 0;
	// 0 turns the move off.
	SplitMerge float64
	// RaoBlackwell keeps, with each draw, the placement probabilities of
	// the scan that produced it (Draw.Soft), for the summaries to average.
	RaoBlackwell bool
}

// DefaultGibbsConfig returns m = 3 auxiliary segments and 1,500 sweeps,
// 500 of them burn-in, keeping every 2nd (500 draws), half a split-merge
// proposal per sweep and recorded placement probabilities.
//
// The split-merge rate: on simulated categories of 300 products with
// overlapping segments (BenchmarkSplitMergeMixing) a proposal cost about
// one sweep and was accepted 0.5 to 1.4% of the time; at 0.5 per sweep
// the autocorrelation time of the number of segments, counted in CPU
// seconds, fell tenfold where single-product moves were stuck and rose
// by up to half elsewhere. Recording costs a few per cent of a sweep.
func DefaultGibbsConfig() GibbsConfig {
	return GibbsConfig{Prior: DefaultPrior(), Aux: 3, Sweeps: 1500, Burn: 500, Thin: 2, SplitMerge: 0.5, RaoBlackwell: true}
}

// maxSplitMerge bounds the split-merge proposals per sweep: each costs
// a few passes over the members of the segments it touches.
const maxSplitMerge = 1000

// ErrConfig reports an invalid sampler setting.
var ErrConfig = errors.New("sequential: invalid configuration")

// Validate reports the first setting out of range.
func (c GibbsConfig) Validate() error {
	if err := c.Prior.Validate(); err != nil {
		return err
	}
	switch {
	case c.Aux < 1:
		return fmt.Errorf("%w: aux = %d, want >= 1", ErrConfig, c.Aux)
	case c.Sweeps < 1:
		return fmt.Errorf("%w: sweeps = %d, want >= 1", ErrConfig, c.Sweeps)
	case c.Burn < 0 || c.Burn >= c.Sweeps:
		return fmt.Errorf("%w: burn = %d, want 0 <= burn < sweeps (%d)", ErrConfig, c.Burn, c.Sweeps)
	case c.Thin < 1:
		return fmt.Errorf("%w: thin = %d, want >= 1", ErrConfig, c.Thin)
	case !(c.SplitMerge >= 0 && c.SplitMerge <= maxSplitMerge):
		return fmt.Errorf("%w: split-merge = %v, want 0..%d proposals per sweep", ErrConfig, c.SplitMerge, maxSplitMerge)
	}
	return nil
}

// Gibbs is the batch Pólya-urn sampler for the non-conjugate mixture:
// Algorithm 8 of Neal (2000) for assignments with p integrated out,
// a slice update (Neal 2003) of each segment's log a and random-walk
// Metropolis steps on its log k and log s (package doc), and
// Escobar and West (1995) for alpha. It is the reference the sequential
// updater is validated against. Not safe for concurrent use.
type Gibbs struct {
	cfg   GibbsConfig
	prior Prior
	st    *State
	mem   [][]int
	sweep int
	moves MoveStats
	soft  *Soft // the last recorded scan, nil if the last sweep did not record
}

// NewGibbs starts a sampler over data (every datum non-nil) with all
// products in one segment whose parameters and alpha are drawn from the
// prior with src.
func NewGibbs(data []*Datum, cfg GibbsConfig, src *rand.Rand) (*Gibbs, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	g := &Gibbs{cfg: cfg, prior: cfg.Prior}
	g.st = newState(&g.prior, cfg.Aux, len(data), cfg.Prior.DrawAlpha(src))
	if len(data) == 0 {
		return g, nil
	}
	c := g.st.newSegment(cfg.Prior.DrawTheta(src))
	for i, d := range data {
		if d == nil {
			return nil, fmt.Errorf("%w: datum %d is nil", ErrDatum, i)
		}
		g.st.data[i] = d
		g.st.n++
		g.st.join(i, d, c)
	}
	return g, nil
}

// Sweep performs one full scan: the split-merge proposals, every product
// reassigned once in order, every occupied segment's parameters updated,
// then alpha.
func (g *Gibbs) Sweep(src *rand.Rand) { g.sweepOnce(src, false) }

// sweepOnce is Sweep, recording the scan's placement probabilities when
// record is true (kept for the next Draw).
func (g *Gibbs) sweepOnce(src *rand.Rand, record bool) {
	st := g.st
	g.moves = g.moves.Add(st.splitMergeMoves(g.cfg.SplitMerge, src))
	g.soft = nil
	if record {
		g.soft = &Soft{}
		st.scan(src, g.soft)
	} else {
		st.scan(src, nil)
	}
	g.mem = st.updateKernelsAndAlpha(g.mem, src)
	g.sweep++
}

// Draw returns the current state as an equal-weight draw; the labels are
// copied, so the draw stays valid after further sweeps. It carries the
// placement probabilities of the last sweep when Run recorded them.
func (g *Gibbs) Draw() Draw {
	d := g.st.draw(0)
	d.Labels = append([]uint16(nil), d.Labels...)
	d.Soft = g.soft
	return d
}

// NumSegments returns the number of occupied segments now.
func (g *Gibbs) NumSegments() int { return g.st.numSegments() }

// ProposeSplitMerge makes n split-merge proposals on the current state,
// outside any sweep, and returns their outcomes (also added to Moves).
func (g *Gibbs) ProposeSplitMerge(src *rand.Rand, n int) MoveStats {
	m := g.st.splitMergeMoves(float64(n), src)
	g.moves = g.moves.Add(m)
	return m
}

// Moves returns the split-merge proposals and acceptances so far.
func (g *Gibbs) Moves() MoveStats { return g.moves }

// Alpha returns the current concentration.
func (g *Gibbs) Alpha() float64 { return g.st.alpha }

// Progress is called by Run after every sweep with the sweep number
// (1-based), the total and the current number of segments.
type Progress func(sweep, total, segments int)

// Run performs cfg.Sweeps sweeps and returns the kept draws (every Thin-th
// after Burn). progress may be nil.
func (g *Gibbs) Run(src *rand.Rand, progress Progress) []Draw {
	var out []Draw
	for s := 1; s <= g.cfg.Sweeps; s++ {
		keep := s > g.cfg.Burn && (s-g.cfg.Burn)%g.cfg.Thin == 0
		g.sweepOnce(src, keep && g.cfg.RaoBlackwell)
		if keep {
			out = append(out, g.Draw())
		}
		if progress != nil {
			progress(s, g.cfg.Sweeps, g.st.numSegments())
		}
	}
	return out
}
