package alerts

import (
	"errors"
	"fmt"
	"math"
)

// Sentinel errors; every error returned by the package wraps one of them.
var (
	// ErrConfig reports a Config setting out of range.
	ErrConfig = errors.New("alerts: invalid config")
	// ErrRefit reports a Refit whose fields disagree with each other
	// (lengths, product ids, partition, memberships, next-value summaries).
	ErrRefit = errors.New("alerts: invalid refit")
	// ErrMemory reports a Memory that cannot have come from Evaluate
	// (malformed or not yet issued segment ids, bad alert probabilities).
	ErrMemory = errors.New("alerts: invalid memory")
	// ErrAssign reports a cost matrix that Assign cannot solve.
	ErrAssign = errors.New("alerts: invalid assignment matrix")
	// ErrEvent reports an event that cannot be encoded.
	ErrEvent = errors.New("alerts: cannot encode event")
)

// Config holds the per-category alert settings. Start from DefaultConfig;
// the zero value is not valid.
type Config struct {
	// MoveIn, in (0, 1], is the least membership (mean posterior
	// similarity, sequential.Summary.Membership) to its new segment that
	// a product needs before its reported segment changes.
	MoveIn float64
	// MoveOut, in [0, MoveIn), is the most membership to the segment it
	// is reported in that a product may keep and still move out. The gap
	// between MoveOut and MoveIn is the hysteresis band that keeps a
	// product between two segments from flapping.
	MoveOut float64
	// Confirm >= 1 is the number of consecutive refits a segment
	// assignment must hold before it counts: a move is reported at the
	// last of Confirm consecutive refits that meet the MoveIn and MoveOut
	// conditions towards the same segment, and a new product's label is
	// provisional (follows its point segment without events) until it has
	// stood unchanged for Confirm refits. 1 moves at the first crossing
	// and establishes new products at once.
	//
	// Each refit replaces a product's datum, and now and then a fresh
	// datum from the product's own segment looks confidently like another
	// one (memberships near 1, so no membership band can tell it from a
	// real move). Such a blip is gone at the next refit, whereas a real
	// move persists; Confirm = 2 filters the blips at the cost of
	// reporting real moves one refit later (simulation_test.go measures
	// both settings).
	Confirm int
	// Threshold, a relative cross-elasticity > 0, is the t of the
	// missed-competitor rule P(next value > t) >= AlertProb. It must equal
	// the threshold the summary was computed at
	// (sequential.SummaryOptions.Threshold).
	Threshold float64
	// AlertProb, in (0, 1], is the probability q at or above which a
	// product is said to have probably missed a competitor.
	AlertProb float64
	// RealertMargin, in (0, 1), is how far the probability must rise
	// above the last alert's before a product is alerted again, and how
	// far below AlertProb it must fall before the alert is cleared.
	RealertMargin float64
	// SplitShare, in (0, 0.5], is the least share of a previous segment's
	// (still present) members that must go to each of two new segments
	// for a split to be reported, and that each of two previous segments
	// must send to one new segment for a merge.
	SplitShare float64

	// Rule picks the move rule: RuleBand (the membership band above) or
	// RuleFilter (the switch filter, filter.go). The settings below are
	// the filter's; the band rule ignores them.
	Rule MoveRule
	// SwitchRate, eps in (0, 0.5], is the filter's prior probability
	// that a product changes segment between two refits. Default rule:
	// the share of products expected to change segment per refit, e.g.
	// 10% of a category over 8 weekly refits is 0.1 / 7 = 0.014; the
	// default 0.01 is one product in a hundred per refit.
	SwitchRate float64
	// Temper, gamma in (0, 1], is the power the filter raises each
	// refit's predictive density to. A refit re-estimated on mostly the
	// same weeks of sales as the last repeats much of its evidence, and
	// gamma < 1 discounts it. The default is 1: on simulated refits that
	// re-estimate the same values (alerts/backtest_test.go) a smaller
	// gamma only delayed the detection of real moves without removing
	// false ones, because the false ones come from the segmentation, not
	// from evidence counted twice. Lower it where refits share most of
	// their data and the backtest of the category shows repeated false
	// moves.
	Temper float64
	// MoveProb, in (0.5, 1), is the filter's probability that a product
	// has switched segment since its label was set at or above which it
	// is moved.
	MoveProb float64

	// AlertBudget >= 0 caps the number of missed-competitor alerts in
	// force per refit: the top AlertBudget by expected excess over the
	// threshold; 0 sets no cap.
	AlertBudget int
	// AlertShare, in [0, 1], caps the alerts in force at that share of
	// the category's products (rounded up); 0 sets no cap. With both
	// caps set the smaller applies. Neither changes which products meet
	// the threshold rule, only how many of them are alerted.
	AlertShare float64
}

// alertLimit returns the alert cap for n products, -1 for none.
func (c Config) alertLimit(n int) int {
	limit := -1
	if c.AlertBudget > 0 {
		limit = c.AlertBudget
	}
	if c.AlertShare > 0 {
		s := int(math.Ceil(c.AlertShare * float64(n)))
		if limit < 0 || s < limit {
			limit = s
		}
	}
	return limit
}

// DefaultConfig returns MoveIn 0.6, MoveOut 0.4, Confirm 2, Threshold
// 0.25, AlertProb 0.5, RealertMargin 0.1, SplitShare 0.3, the band rule,
// and for the filter SwitchRate 0.01, Temper 1 and MoveProb 0.6.
func DefaultConfig() Config {
	return Config{MoveIn: 0.6, MoveOut: 0.4, Confirm: 2, Threshold: 0.25, AlertProb: 0.5, RealertMargin: 0.1, SplitShare: 0.3,
		Rule: RuleBand, SwitchRate: 0.01, Temper: 1, MoveProb: 0.6}
}

// Validate reports the first setting out of range; errors wrap ErrConfig
// and name the setting.
func (c Config) Validate() error {
	switch {
	case !(c.MoveIn > 0 && c.MoveIn <= 1):
		return fmt.Errorf("%w: move_in %v, want in (0, 1]", ErrConfig, c.MoveIn)
	case !(c.MoveOut >= 0 && c.MoveOut < c.MoveIn):
		return fmt.Errorf("%w: move_out %v, want in [0, move_in %v)", ErrConfig, c.MoveOut, c.MoveIn)
	case c.Confirm < 1:
		return fmt.Errorf("%w: confirm %d, want >= 1", ErrConfig, c.Confirm)
	case !(c.Threshold > 0) || math.IsInf(c.Threshold, 1):
		return fmt.Errorf("%w: threshold %v, want finite and > 0", ErrConfig, c.Threshold)
	case !(c.AlertProb > 0 && c.AlertProb <= 1):
		return fmt.Errorf("%w: alert_prob %v, want in (0, 1]", ErrConfig, c.AlertProb)
	case !(c.RealertMargin > 0 && c.RealertMargin < 1):
		return fmt.Errorf("%w: realert_margin %v, want in (0, 1)", ErrConfig, c.RealertMargin)
	case !(c.SplitShare > 0 && c.SplitShare <= 0.5):
		return fmt.Errorf("%w: split_share %v, want in (0, 0.5]", ErrConfig, c.SplitShare)
	case c.Rule != RuleBand && c.Rule != RuleFilter:
		return fmt.Errorf("%w: move_rule %q, want band or filter", ErrConfig, c.Rule)
	case !(c.SwitchRate > 0 && c.SwitchRate <= 0.5):
		return fmt.Errorf("%w: switch_rate %v, want in (0, 0.5]", ErrConfig, c.SwitchRate)
	case !(c.Temper > 0 && c.Temper <= 1):
		return fmt.Errorf("%w: temper %v, want in (0, 1]", ErrConfig, c.Temper)
	case !(c.MoveProb > 0.5 && c.MoveProb < 1):
		return fmt.Errorf("%w: move_prob %v, want in (0.5, 1)", ErrConfig, c.MoveProb)
	case c.AlertBudget < 0:
		return fmt.Errorf("%w: max_alerts %d, want >= 0 (0: no cap)", ErrConfig, c.AlertBudget)
	case !(c.AlertShare >= 0 && c.AlertShare <= 1):
		return fmt.Errorf("%w: max_alert_share %v, want in [0, 1] (0: no cap)", ErrConfig, c.AlertShare)
	}
	return nil
}
