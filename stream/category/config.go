package category

import (
	"fmt"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/stream/input"
)

// WorkerConfig holds one category's model and alert settings.
type WorkerConfig struct {
	Particles sequential.ParticleConfig
	Alerts    alerts.Config
	Summary   sequential.SummaryOptions
	// Seed seeds a new category's particle system (with the category
	// name, so categories draw independent streams).
	Seed uint64
	// BatchSize closes a micro-batch (a Settle) once this many products
	// changed since the last settle, >= 1. The count is part of the
	// saved state, so the settle points, and hence the posterior, do not
	// depend on how messages were grouped into fetches or commits.
	BatchSize int
	// Competitors is the category's default L for messages that do not
	// state it (the decoder's DefaultCompetitors), 1..input.MaxCompetitors.
	Competitors int
}

// DefaultWorkerConfig returns the package defaults of sequential and
// alerts, micro-batches of 256 and L = input.DefaultCompetitors.
func DefaultWorkerConfig() WorkerConfig {
	return WorkerConfig{
		Particles:   sequential.DefaultParticleConfig(),
		Alerts:      alerts.DefaultConfig(),
		Summary:     sequential.DefaultSummaryOptions(),
		Seed:        1,
		BatchSize:   256,
		Competitors: input.DefaultCompetitors,
	}
}

// Validate reports the first setting out of range, naming it.
func (c WorkerConfig) Validate() error {
	if err := c.Particles.Validate(); err != nil {
		return err
	}
	if err := c.Alerts.Validate(); err != nil {
		return err
	}
	if err := c.Summary.Validate(); err != nil {
		return err
	}
	if c.BatchSize < 1 {
		return fmt.Errorf("category: WorkerConfig.BatchSize is %d, want >= 1", c.BatchSize)
	}
	return input.ValidateCompetitors("category: WorkerConfig.Competitors", c.Competitors)
}

// DecodeOptions returns base with the category's default L.
func (c WorkerConfig) DecodeOptions(base input.DecodeOptions) input.DecodeOptions {
	base.DefaultCompetitors = c.Competitors
	return base
}
