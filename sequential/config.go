package sequential

import "fmt"

// Resampler names a resampling scheme.
type Resampler int

const (
	// Systematic resampling: one uniform, evenly spaced points.
	Systematic Resampler = iota
	// Residual resampling: floor(n w) copies each, the rest multinomially.
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

// ParticleConfig sets up the sequential updater. Start from
// DefaultParticleConfig.
type ParticleConfig struct {
	Prior Prior
	// Aux is the number m of auxiliary segments per placement (Algorithm 8).
	Aux int
	// Particles is P, the size of the population.
	Particles int
	// ESSFraction triggers resampling when the effective sample size
	// falls below ESSFraction * P; in (0, 1].
	ESSFraction float64
	Resampler   Resampler
	// Sweeps is the number of passes of a settle between refits: each
	// reassigns the products changed since the last settle plus, when the
	// population was resampled since, a random RandomShare of the others,
	// then refreshes the kernel of each segment holding t changed products
	// of n with probability min(1, 2t/n), and alpha.
	Sweeps      int
	RandomShare float64
	// KeepESS chooses between the two exact forms of a Replace (package
	// doc): the assignment is kept, with weight f(new)/f(old), when that
	// leaves an effective sample size of at least KeepESS times the one
	// before and the weights' mean is at least KeepESS times the redraw's
	// estimate of the same predictive ratio; otherwise the product is
	// placed afresh. 0 always places afresh; in [0, 1].
	KeepESS float64
	// SplitMerge is the number of split-merge proposals per MCMC step of
	// the first build and of the waste-free steps (fractional part: the
	// chance of one more); >= 0.
	SplitMerge float64
	// RaoBlackwell records, in every MCMC step that produces a member of
	// the population, the placement probabilities of its scan (Draw.Soft).
	RaoBlackwell bool
	// BuildChains and BuildBurn shape the first population of a category:
	// BuildChains batch chains (at most P), each BuildBurn sweeps of
	// burn-in and then as many kept sweeps as it takes to make P states
	// together.
	BuildChains, BuildBurn int
	// RefitBurn is the most MCMC steps each chain of a waste-free step
	// runs before its states are kept, reached when the changes have left
	// the weights on a single effective particle (see Particles.wasteFree);
	// >= 0.
	RefitBurn int
	// MinChains is the fewest chains M of a waste-free step (at most P),
	// so that chains are at most P/MinChains steps long; the step uses
	// more the less the data changed (package doc).
	MinChains int
	// DiversityFloor is the share of P below which the number of distinct
	// partitions in the population makes a settle of a small batch (single
	// changes between refits) run a waste-free step; in [0, 1], 0 turns
	// the watch off.
	DiversityFloor float64
	// RenewBelow makes a settle of a small batch run a waste-free step
	// once the changes since the last one have left an ESS share below
	// it, the resamplings in between multiplied in (the population then
	// descends from fewer than RenewBelow * P effective ancestors); in
	// [0, 1], 0 turns it off. A settle of a large batch (a refit in
	// progress) never renews: the refit's end does. It also sets where
	// the waste-free step's burn-in begins (RefitBurn).
	RenewBelow float64
	// Workers is the number of goroutines over particles and chains; 0
	// means GOMAXPROCS. Results do not depend on it.
	Workers int
}

// DefaultParticleConfig returns the updater's defaults: P = 256, m = 3,
// resampling below P/2 with the systematic scheme; settles of 2 passes
// over the changed products plus, after a resampling, 10% of the others;
// a Replace keeps the assignments when its weights allow it at KeepESS
// 0.5; half a split-merge proposal per MCMC step and recorded placement
// probabilities; a first population from 16 batch chains of 150 burn-in
// sweeps; waste-free steps of at least 16 chains; and, between refits,
// a waste-free step at a settle when the changes since the last one left
// an ESS share below 0.05 or fewer than a quarter of the states are
// distinct.
func DefaultParticleConfig() ParticleConfig {
	return ParticleConfig{Prior: DefaultPrior(), Aux: 3, Particles: 256, ESSFraction: 0.5,
		Resampler: Systematic, Sweeps: 2, RandomShare: 0.1, KeepESS: 0.5, SplitMerge: 0.5, RaoBlackwell: true,
		BuildChains: 16, BuildBurn: 150, RefitBurn: 50, MinChains: 16, DiversityFloor: 0.25, RenewBelow: 0.05}
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
	case !(c.RandomShare >= 0 && c.RandomShare <= 1):
		return fmt.Errorf("%w: random share = %v, want in [0, 1]", ErrConfig, c.RandomShare)
	case !(c.KeepESS >= 0 && c.KeepESS <= 1):
		return fmt.Errorf("%w: keep ess = %v, want in [0, 1]", ErrConfig, c.KeepESS)
	case !(c.SplitMerge >= 0 && c.SplitMerge <= maxSplitMerge):
		return fmt.Errorf("%w: split-merge = %v, want 0..%d proposals per step", ErrConfig, c.SplitMerge, maxSplitMerge)
	case c.BuildChains < 1:
		return fmt.Errorf("%w: build chains = %d, want >= 1", ErrConfig, c.BuildChains)
	case c.BuildBurn < 0:
		return fmt.Errorf("%w: build burn = %d, want >= 0", ErrConfig, c.BuildBurn)
	case c.RefitBurn < 0:
		return fmt.Errorf("%w: refit burn = %d, want >= 0", ErrConfig, c.RefitBurn)
	case c.MinChains < 1:
		return fmt.Errorf("%w: min chains = %d, want >= 1", ErrConfig, c.MinChains)
	case !(c.DiversityFloor >= 0 && c.DiversityFloor <= 1):
		return fmt.Errorf("%w: diversity floor = %v, want in [0, 1]", ErrConfig, c.DiversityFloor)
	case !(c.RenewBelow >= 0 && c.RenewBelow <= 1):
		return fmt.Errorf("%w: renew below = %v, want in [0, 1]", ErrConfig, c.RenewBelow)
	case c.Workers < 0:
		return fmt.Errorf("%w: workers = %d, want >= 0", ErrConfig, c.Workers)
	}
	return nil
}
