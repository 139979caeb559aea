package input

import (
	"fmt"

	"rivalmix/sequential"
)

const (
	// DefaultCompetitors is L, the number of candidate competitors, for a
	// datum that does not say and a category whose settings do not either.
	DefaultCompetitors = 10
	// MaxCompetitors is the largest L a message may give: the model's
	// limit.
	MaxCompetitors = sequential.MaxCompetitors

	defaultMaxBytes = 64 << 10
	maxNameBytes    = 128
	maxExpected     = 1<<31 - 1
)

// DecodeOptions tune [Decode] and [DecodeLines]. The zero value means the
// defaults of [DefaultDecodeOptions].
type DecodeOptions struct {
	// DefaultCompetitors is L for a datum that does not give
	// "competitors": 1..MaxCompetitors, 0 for [DefaultCompetitors].
	DefaultCompetitors int
	// Strict rejects a datum with a non-positive entry instead of
	// dropping the entry.
	Strict bool
	// MaxBytes is the largest accepted payload (or line) in bytes;
	// 0 for the default 64 KiB.
	MaxBytes int
}

// DefaultDecodeOptions returns L = 10 candidate competitors, non-positive
// entries dropped, and payloads up to 64 KiB.
func DefaultDecodeOptions() DecodeOptions {
	return DecodeOptions{DefaultCompetitors: DefaultCompetitors, MaxBytes: defaultMaxBytes}
}

// ValidateCompetitors reports an L outside 1..MaxCompetitors; field names
// the setting in the error.
func ValidateCompetitors(field string, l int) error {
	if l < 1 || l > MaxCompetitors {
		return fmt.Errorf("%s is %d, want 1..%d candidate competitors", field, l, MaxCompetitors)
	}
	return nil
}

// Validate reports options no message could be decoded with. Zero fields
// are valid: they select the defaults.
func (o DecodeOptions) Validate() error {
	if o.DefaultCompetitors != 0 {
		if err := ValidateCompetitors("input: DecodeOptions.DefaultCompetitors", o.DefaultCompetitors); err != nil {
			return fmt.Errorf("%w (0 for %d)", err, DefaultCompetitors)
		}
	}
	if o.MaxBytes < 0 {
		return fmt.Errorf("input: DecodeOptions.MaxBytes is %d, want > 0 (0 for %d)", o.MaxBytes, defaultMaxBytes)
	}
	return nil
}

func (o DecodeOptions) withDefaults() (DecodeOptions, error) {
	if err := o.Validate(); err != nil {
		return o, err
	}
	if o.DefaultCompetitors == 0 {
		o.DefaultCompetitors = DefaultCompetitors
	}
	if o.MaxBytes == 0 {
		o.MaxBytes = defaultMaxBytes
	}
	return o, nil
}
