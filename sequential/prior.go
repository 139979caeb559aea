package sequential

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
)

// Normal is a normal law with mean Mu and standard deviation Sigma > 0.
type Normal struct {
	Mu, Sigma float64
}

func (n Normal) logProb(x float64) float64 {
	z := (x - n.Mu) / n.Sigma
	return -0.5*z*z - math.Log(n.Sigma) - 0.5*math.Log(2*math.Pi)
}

// Prior holds the hyperparameters of the Dirichlet process mixture
// (model section 3). The zero value is not valid; start from DefaultPrior.
type Prior struct {
	// CountA and CountB are the Beta prior of the report probability p.
	CountA, CountB float64
	// LogA, LogK and LogS are the base-measure normals of log a, log k
	// and log s (s in relative-elasticity units).
	LogA, LogK, LogS Normal
	// AlphaShape and AlphaRate are the Gamma(shape, rate) prior of the DP
	// concentration alpha.
	AlphaShape, AlphaRate float64
}

// DefaultPrior returns the defaults of model section 3: p ~ Beta(1,1),
// log a ~ N(0,1), log k ~ N(0,1), log s ~ N(log 0.3, 1), alpha ~ Gamma(1,1).
func DefaultPrior() Prior {
	return Prior{
		CountA: 1, CountB: 1,
		LogA:       Normal{0, 1},
		LogK:       Normal{0, 1},
		LogS:       Normal{math.Log(0.3), 1},
		AlphaShape: 1, AlphaRate: 1,
	}
}

// ErrPrior reports invalid hyperparameters.
var ErrPrior = errors.New("sequential: invalid prior")

// Validate reports the first hyperparameter that is not finite and in range.
func (p Prior) Validate() error {
	pos := []struct {
		name string
		v    float64
	}{
		{"count_a", p.CountA}, {"count_b", p.CountB},
		{"log_a.sigma", p.LogA.Sigma}, {"log_k.sigma", p.LogK.Sigma}, {"log_s.sigma", p.LogS.Sigma},
		{"alpha_shape", p.AlphaShape}, {"alpha_rate", p.AlphaRate},
	}
	for _, f := range pos {
		if !(f.v > 0) || math.IsInf(f.v, 0) {
			return fmt.Errorf("%w: %s = %v, want finite and > 0", ErrPrior, f.name, f.v)
		}
	}
	for _, f := range []struct {
		name string
		v    float64
	}{{"log_a.mu", p.LogA.Mu}, {"log_k.mu", p.LogK.Mu}, {"log_s.mu", p.LogS.Mu}} {
		if math.IsNaN(f.v) || math.IsInf(f.v, 0) {
			return fmt.Errorf("%w: %s = %v, want finite", ErrPrior, f.name, f.v)
		}
	}
	return nil
}

// DrawTheta draws segment parameters from the base measure G0.
func (p Prior) DrawTheta(src *rand.Rand) Theta {
	return Theta{
		LogA: p.LogA.Mu + p.LogA.Sigma*src.NormFloat64(),
		LogK: p.LogK.Mu + p.LogK.Sigma*src.NormFloat64(),
		LogS: p.LogS.Mu + p.LogS.Sigma*src.NormFloat64(),
	}
}

// LogBase returns the log density of G0 at t, on the log-parameter scale.
func (p Prior) LogBase(t Theta) float64 {
	return p.LogA.logProb(t.LogA) + p.LogK.logProb(t.LogK) + p.LogS.logProb(t.LogS)
}

// DrawAlpha draws the concentration from its Gamma prior.
func (p Prior) DrawAlpha(src *rand.Rand) float64 {
	return gammaRand(src, p.AlphaShape) / p.AlphaRate
}

// gammaRand draws Gamma(shape, 1) by Marsaglia and Tsang (2000), with the
// usual boost u^(1/shape) for shape < 1.
func gammaRand(src *rand.Rand, shape float64) float64 {
	if shape < 1 {
		u := src.Float64()
		for u == 0 {
			u = src.Float64()
		}
		return gammaRand(src, shape+1) * math.Pow(u, 1/shape)
	}
	d := shape - 1.0/3
	c := 1 / math.Sqrt(9*d)
	for {
		x := src.NormFloat64()
		v := 1 + c*x
		if v <= 0 {
			continue
		}
		v = v * v * v
		u := src.Float64()
		if u < 1-0.0331*x*x*x*x {
			return d * v
		}
		if u > 0 && math.Log(u) < 0.5*x*x+d*(1-v+math.Log(v)) {
			return d * v
		}
	}
}

// betaRand draws Beta(a, b) from two gamma draws.
func betaRand(src *rand.Rand, a, b float64) float64 {
	x := gammaRand(src, a)
	y := gammaRand(src, b)
	return x / (x + y)
}
