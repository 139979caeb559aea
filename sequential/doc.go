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
// slice update of a narrow conditional costs about ten. Each sweep begins
// with SplitMerge split-merge proposals.
//
// # Split-merge move
//
// Algorithm 8 moves one product at a time, so a large segment that the
// chain has split in two (or two that it has joined) takes a very long
// run of unlikely single moves to mend. The split-merge move proposes
// the whole change at once and accepts it by Metropolis-Hastings.
//
// Pick an ordered pair of distinct products (i, j) uniformly; the chance
// of a pair is the same in every state, so it cancels. If they share a
// segment c, propose to split c into part 1 (holding i) and part 2
// (holding j); otherwise propose to merge their segments c_i and c_j into
// one. Let S be the other members of the segment(s), in a uniformly
// random order sigma (drawn afresh each time, the same in both
// directions, so its chance cancels too).
//
// Allocation (Dahl 2003, sequentially allocated split-merge): the members
// of S go to the parts one at a time in the order sigma; product k goes
// to part x with probability proportional to n_x f_x(y_k), where n_x is
// the part's size so far and f_x the beta-binomial count term given the
// part's counts times the value likelihood under the part's provisional
// kernel, the centre of a quick Laplace fit (below) to the part's members
// so far, refitted each time the part doubles. The product of these
// probabilities is the allocation's probability q_A; for a merge it is
// computed for the split that the merge would undo.
//
// Kernels: each proposed segment's (log a, log k, log s) is drawn from an
// independence proposal fitted to its members: a multivariate t with
// five degrees of freedom centred at the mode of the segment's
// conditional posterior G0(theta) prod f_v(y_k | theta) and scaled by the
// inverse of minus its Hessian there (a Laplace approximation, found by
// Newton steps with the analytic gradient and Hessian of the value
// density). Write q_1, q_2 for the parts' proposals and q_U for the
// union's. A fit depends only on its members in order and on where its
// Newton steps start, and every start is something both directions of
// the move see: the provisional kernels, or for q_U the kernel of the
// larger part of the split state.
//
// Ratio: with pi the posterior (p integrated out), splitting c with
// kernel theta into parts 1 and 2 with kernels theta_1, theta_2 is
// accepted with probability min(1, R), where
//
//	R = alpha Gamma(n_1) Gamma(n_2) / Gamma(n_1 + n_2)            (Chinese restaurant)
//	  * B_1 B_2 / B_U                                            (counts, p integrated out)
//	  * G0(theta_1) G0(theta_2) / G0(theta)
//	  * prod_1 f_v(y | theta_1) prod_2 f_v(y | theta_2) / prod_U f_v(y | theta)
//	  * q_U(theta) / (q_A q_1(theta_1) q_2(theta_2))
//
// with B_x = B(a0 + A_x, b0 + B_x) / B(a0, b0) the beta-binomial marginal
// of part x's reported and unreported totals. The first four lines are
// pi(split) / pi(merged); the last is the reverse proposal over the
// forward one: the merge proposes theta from q_U and nothing else, the
// split proposes the allocation and two kernels. A merge is accepted with
// probability min(1, 1/R), R computed for the split it undoes with
// (theta_1, theta_2) the segments' current kernels and theta the drawn
// one. Every term is needed: the tests drop each in turn (the proposal
// densities, the allocation, the count term, the CRP factor) and both the
// enumeration of a five-product posterior and Geweke's test then fail.
//
// Restricted Gibbs scans (Jain and Neal 2004) from a launch state were
// tried as the allocation and accepted half as often, so the sequential
// allocation stays. Fits on segments of more than 32 products take their
// first steps on the first 32 (scaled up), then one or two on all.
//
// # Rao-Blackwellised summaries
//
// A scan that reassigns product i computes, before drawing, the
// probability p_i(c) of placing i in each existing segment c given every
// other product's label at that moment. E[1(z_i = z_j)] = E[p_i(z_j)]
// when z_j is read at i's update, because the state at that moment is a
// draw from the posterior too; so averaging p_i(z_j) over kept states
// estimates P(i ~ j) with less variance than averaging the 0/1
// indicator. A kept state records, from the scan that produced it, every
// product's p_i above SoftFloor and the products the scan moved with
// their labels before it (Soft); at i's update product j's label is its
// label after the scan when j < i and before it when j > i. The
// co-segment probability of a pair is the mean of p_i(z_j) and p_j(z_i),
// each read that way. Similarity, SimilarityMatrix, ExpectedBinder,
// the point partition's search and Membership use it (the search reads
// each pair from i's end only, as its moves concern i; the loss it
// reports counts both). Not Rao-Blackwellised: the number of segments
// and alpha (the states' own), the decay summaries and the next-value
// mixtures, which need the kernels of the auxiliary segments a product
// could have opened, which are not kept.
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
// # Sequential updater: first population
//
// A new category's adds only record its products. At the end of its first
// refit (SettleRefit, or Build) the population is made from BuildChains
// batch chains, each from all products in one segment, BuildBurn sweeps
// of burn-in with split-merge, then one kept state per MCMC step until
// the chains hold P states together, each with weight 1. Building from a
// greedy sequence of Adds, as the first design did, left populations that
// held a segment too many or too few in a sixth of simulated categories.
// Adds stay for products that join later. A system built with no products
// takes every product by Add (the tests use this to check the Add weight
// against exact posteriors).
//
// # Sequential updater: degeneracy control
//
// After every operation the effective sample size 1/sum W^2 is checked;
// below ESSFraction*P the particles are resampled (systematic, or
// residual) and the product just changed is reassigned in every particle,
// so copies begin to diverge. Settle, at the end of a micro-batch of
// changes, resamples if needed and runs Sweeps passes over the changed
// products (and, after a resampling, a random share of the others), each
// move leaving the current posterior invariant; so a settle after a few
// changes costs little. Passes that would cost a full sweep per particle
// or more (a micro-batch of a whole refit) are left out: the waste-free
// step at the refit's end costs that much and moves everything.
//
// Every resampling multiplies in the ESS share it absorbed (logMoved),
// so exp(logMoved) * ESS/P measures how far the target has moved since
// the last waste-free step. After a small micro-batch (single changes
// between refits) Settle renews the population (a waste-free step) when
// that share falls below RenewBelow or when fewer than DiversityFloor * P
// of the particles are distinct partitions (the diversity watch). After
// a large one (a refit in progress) it renews nothing, however far the
// weights have fallen: the refit's end runs a waste-free step from the
// weights the whole refit leaves, so a renewal inside the refit would be
// paid for twice (it cost about 40% of a refit's MCMC when it ran).
//
// # Sequential updater: waste-free steps
//
// At a refit's end (SettleRefit), after a Remove whose weights collapse,
// and whenever the diversity watch between refits calls for it, the
// population is renewed by a waste-free step (Dau and Chopin 2022): M of
// the P weighted particles are resampled and each is run through a chain
// of about P/M MCMC steps (split-merge, a scan of every product, every
// kernel, alpha); every state the chains visit joins the new population
// with weight 1, P states in all. The chains leave the current posterior invariant and
// start from a resampled weighted sample of it, so the visited states are
// (correlated) draws from it, and none of the work is thrown away. M
// follows how far the target moved since the last step: the ESS share
// left by the changes, multiplied over the resamplings in between
// (logMoved), times P, at least MinChains. After a small re-estimate the
// share is near 1 and the step runs many short chains from many
// ancestors; after a refit that redraws every product it is near 0 and
// the step runs MinChains long chains. When the changes have left the
// weights on fewer than RenewBelow * P effective particles, each chain
// first runs up to RefitBurn steps whose states are not kept (RefitBurn
// when a single effective particle is left, fewer on a log scale above
// that): its start is then a copy of one or two states of the old
// posterior, and the kept states should not be. Without that burn-in,
// after a refit that redrew every product of an overlapping category the
// population's law of K was 0.26 away (TV) from a long batch run's; with
// it, 0.11. Otherwise the step costs P MCMC steps, against P times
// RefitSweeps in the first design. Its scans record placement probabilities
// (RaoBlackwell), so the summaries right after it are Rao-Blackwellised.
//
// The diversity watch: resampling makes copies, and moves of the few
// changed products seldom tell them apart, so a stream of single changes
// with no refit end would narrow the population to a few partitions and
// then to a few ancestors. The watch above renews it before that.
//
// # Cheaper changes
//
// Copies that resampling makes share their segments' kernels until one
// of them sets a new theta (each segment carries a memo shared between
// copies). An Add, Replace or Remove scores the datum once per distinct
// kernel in the population before the particles' own passes, which read
// the scores; after a resampling most kernels are shared. The auxiliary
// kernels are each particle's own and are scored by it.
//
// Every particle draws from its own stream, seeded for each operation from
// the one master generator and the particle's index, so results depend on
// neither the number of workers nor scheduling. Assignments are uint16
// labels (2 bytes per particle per product), shared between copies after
// resampling until one of them writes.
package sequential
