// Package sequential holds the statistics of rivalmix: the exponentiated
// Weibull kernel, the likelihood of one product's top-k relative
// cross-elasticities, the batch Gibbs sampler, the sequential Monte Carlo
// updater, posterior summaries and the binary encoding of the updater's
// state. It does no I/O, reads no clock and keeps no globals: all
// randomness comes from generators the caller seeds.
//
// # Model
//
// A product's datum is the top n of L latent values, descending. Given its
// segment theta = (a, k, s, p) the count is Binomial(L, p) and the values
// are the top n order statistics of L iid ExpWeibull(a, k, s) draws. The
// segments follow a Dirichlet process with concentration alpha. p has a
// conjugate Beta prior and is integrated out everywhere: a segment carries
// only its kernel and its count totals A = sum n_j, B = sum (L_j - n_j),
// and a datum's count term given the other members is beta-binomial.
//
// # Batch sampler
//
// Gibbs runs Algorithm 8 of Neal (2000) with m auxiliary segments drawn
// from the base measure, a kernel update per segment, and the
// Escobar-West (1995) update of alpha. The kernel update is a univariate
// slice update (Neal 2003) of log a, which is cheap because for fixed k
// and s the value likelihood of a segment is linear in a and log a (one
// pass over the members, then O(1) per evaluation), followed by two
// rounds of random-walk Metropolis steps on log k and on log s. Their
// steps follow the usual large-sample scale of the conditional,
// 1/sqrt(number of values) and, for log s, 1/k as well, so they need no
// per-category tuning; each costs one pass over the members, where a
// slice update of a narrow conditional costs about ten.
//
// # Sequential updater: weights
//
// Particles carries P weighted States. Write f_c(y) for the likelihood of
// datum y in segment c (value part under theta_c times the beta-binomial
// count term given c's other members), N for the number of products
// before the change, and, for m auxiliary thetas phi_1..phi_m drawn from
// the base measure,
//
//	Z(y) = sum_c n_c f_c(y) + (alpha/m) sum_j f_phi_j(y).
//
// Add. The proposal draws the auxiliaries, then puts the new product in
// segment c with probability n_c f_c(y)/Z or in a new segment with theta
// phi_j with probability (alpha/m) f_phi_j(y)/Z. Extend the new target
// with the auxiliaries (iid base-measure draws, except that a new
// segment's theta sits in a uniformly chosen slot). The new target times
// that extension, divided by the old target times the proposal, is
// Z/(N + alpha) whichever choice was made: the Chinese-restaurant prior
// n_c/(N+alpha) or alpha/(N+alpha) times the likelihood cancels against
// the proposal's numerator, and the base-measure densities cancel. The
// weight is therefore exact on the extended space, and discarding the
// auxiliaries leaves the right marginal.
//
// Remove. Removing a product is a deterministic map; take as backward
// kernel the Algorithm-8 conditional that would put it back, with the
// product's own theta as the first auxiliary when it was alone. The same
// cancellation gives the weight (N - 1 + alpha)/Z, with Z computed
// without the product.
//
// Replace (a refit) has two exact forms, and the updater picks one per
// Replace from the particles as they stand.
//
// Redraw: a Remove followed by an Add of the new datum, so the weight is
// Z(others, new)/Z(others, old) and the assignment is drawn afresh.
//
// Keep: the assignments and kernels stay; the new target differs from the
// old only in product i's factor, so the weight is the ratio of the two
// targets at the particle, f(new)/f(old): the value likelihoods under the
// segment's kernel times the beta-binomial predictives of the two counts
// given the segment's other members (the CRP factor does not change). No
// proposal is drawn, so nothing else enters. The settle then reassigns
// the product, a move that leaves the new posterior invariant.
//
// Keeping costs two likelihoods per particle where the redraw costs two
// Algorithm-8 sums over every segment and 2m auxiliaries. When a product
// really moves, though, f(new)/f(old) is small in every particle: if it
// is small in some and not others the ESS collapses, and if the
// particles agree on the product's segment the weights are small and
// nearly equal, the ESS stays high and yet the sample holds the product
// where the new posterior seldom puts it. So a Replace keeps only when
// both of these hold, and redraws otherwise:
//
//   - the ESS after the keep weights is at least KeepESS times the ESS
//     before;
//   - the keep weights' weighted mean, an estimate of
//     p(new | others)/p(old | others), is at least KeepESS times the
//     redraw's estimate of the same ratio, the weighted mean of
//     Z(others, new)/Z(others, old) on 32 particles spread evenly over
//     the indices. The redraw looks at every segment, so the two
//     estimates part when the product's new datum fits elsewhere.
//
// The choice is made from the particles' weights and states, the same
// way for every particle, as adaptive schemes choose their next
// tempering step; each particle's weight is exact for the form chosen.
// With KeepESS 0 every Replace redraws (the behaviour of state encoded
// before version 3). A weekly re-estimate of the same competitors keeps
// nearly always; a vector drawn afresh from another segment redraws.
//
// The log of the weighted mean of the incremental weights is the log
// predictive density of the change (for an Add, of the datum given the
// data already present); it is returned as the datum's surprise, and the
// running sum estimates the log evidence. A Replace that keeps returns
// instead log p(new | others), from the redraw's two sums on the 32
// particles, so that the surprise means the same whichever form ran. A Remove moves the evidence by
// the forward predictive of the removed datum given the others (estimated
// after the removal's moves) rather than by its reciprocal weights, whose
// tails are heavy. For a product unlike any segment both estimates rest on
// m base-measure draws per particle and are noisy (about a nat in our
// tests); the posterior itself is unaffected.
//
// # Sequential updater: degeneracy control
//
// After every operation the effective sample size 1/sum W^2 is checked;
// below ESSFraction*P the particles are resampled (systematic, or residual)
// and the products touched since the last settle are reassigned in every
// particle, so copies diverge. Settle resamples if needed and runs the
// rejuvenation budget: Sweeps passes, each reassigning the touched
// products and, if the particles were resampled since the last settle, a
// random share of the others (Algorithm 8), updating the kernel of each segment c that holds t_c
// touched products with probability min(1, 2 t_c / n_c), and updating
// alpha; so a settle costs in proportion to the changes it absorbs.
// SettleRefit, at the end of a refit, makes RefitSweeps passes over every
// product and every segment. Each move leaves the current posterior
// invariant: which products and segments are moved is chosen
// independently of the state, or from assignments the kernel update
// leaves alone. Without a resampling no move is needed for correctness,
// so a settle after a single product's refit costs little. Diversity counts distinct ancestors since
// the start, which shows path degeneracy.
//
// Correct is not the same as accurate: every resampling leaves copies of
// fewer ancestors, and a settle that moves the touched products and a
// tenth of the rest does not spread them out again. In diagnostic runs,
// streams of 600 single-product refits with only Settle ended far from a
// long batch run; RandomShare 1 (moving every product after a
// resampling) kept most of them close, at about five times the cost of a
// single refit. Call SettleRefit before reading summaries after a run of
// changes; the service does, at every refit's end.
//
// Every particle draws from its own stream, seeded for each operation from
// the one master generator and the particle's index, so results depend on
// neither the number of workers nor scheduling. Assignments are uint16
// labels (2 bytes per particle per product), shared between copies after
// resampling until one of them writes.
package sequential
