// Package alerts turns the posterior summaries of successive refits of
// one category into events downstream pricing systems can trust: segments
// that keep their names, products that change segment, products that
// probably have a competitor the refit missed, and one summary per refit.
//
// Like package sequential it is pure: no I/O, no clock, no globals and no
// randomness. Everything that persists between refits is a Memory value
// that the caller stores (as JSON) and hands back; Evaluate maps
// (Config, Memory, Refit) to (Memory, Events) deterministically.
//
// # Stable segment ids
//
// The point partition of each refit is numbered by size, so its indices
// mean nothing from one refit to the next. Evaluate labels it with ids
// S1, S2, ... by matching it to the previous labelled partition: the
// overlap table counts the products in both previous segment r and new
// segment c, and the assignment (Hungarian algorithm, Assign) with the
// largest total overlap pairs them. A paired new segment inherits the
// id; an unpaired one, or one paired with zero overlap, is born with a
// fresh id from Memory.Issued; an unpaired previous segment retires. Ids
// are never reused. Splits and merges are read from the same table.
//
// # Moves with hysteresis
//
// Each product has a reported segment. It follows the point segment only
// when the product's membership (mean posterior similarity to the
// segment's members) is at least MoveIn in the new segment and at most
// MoveOut in the old one, so a product whose posterior hovers between two
// segments does not flap.
//
// # The switch filter
//
// With Config.Rule = RuleFilter a hidden Markov model over each
// product's stable segment id decides moves instead (filter.go): a sticky
// transition (stay with probability 1 - SwitchRate), the posterior
// predictive density of each refit's datum under each segment as the
// emission (tempered by Temper), forward filtering, and a flag that
// records whether the product has switched since its label was set. A
// product moves when P(switched) reaches MoveProb; the moved event
// carries it. Its state, 2K numbers per product, is kept in
// Memory.Filter and mapped across births, retirements, splits and
// merges. alerts/backtest_test.go compares both rules on simulated
// refits.
//
// # Missed competitors
//
// A product with n < L reported competitors has a next, unreported value
// Y_(n+1). When P(Y_(n+1) > Threshold) >= AlertProb it is alerted. The
// alert is repeated only if the probability rises RealertMargin above
// the last alert's, and cleared once it falls below AlertProb -
// RealertMargin (or the product reports every candidate). Alerts in
// force are ranked by E[(Y_(n+1) - Threshold)+] (Outcome.Watchlist, with
// status new, still or cleared); an optional budget (AlertBudget,
// AlertShare) keeps only the top ones, without changing who meets the
// threshold rule.
//
// # Events
//
// Events carry deterministic ids (EventID: a hash of category, refit,
// kind and subject), encode to CloudEvents 1.0 JSON (Event.CloudEvent)
// and name their NATS subject (Event.NATSSubject).
package alerts
