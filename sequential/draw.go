package sequential

// Draw is one weighted posterior draw over the segmentation: a sample kept
// by the batch sampler (equal weights) or a particle of the sequential
// updater (unequal weights). Posterior summaries are written once against
// this type so both samplers share them.
//
// Labels[i] is the segment of product i (the i-th datum passed alongside).
// Labels are small non-negative integers indexing Segments; they need not
// be contiguous, and entries of Segments that no product uses are ignored.
// A Draw does not own its slices: callers must not modify them while a
// summary is being computed.
type Draw struct {
	// LogWeight is the unnormalised log importance weight; any common
	// offset cancels.
	LogWeight float64
	Labels    []uint16
	Segments  []Theta
	// Alpha is the Dirichlet process concentration (> 0).
	Alpha float64
	// Soft, when not nil, holds the placement probabilities of the scan
	// that produced Labels; summaries then average those instead of the
	// 0/1 labels where that is valid (package doc, "Rao-Blackwellised
	// summaries").
	Soft *Soft
}
