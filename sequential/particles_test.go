package sequential_test

// Black-box checks of the particle updater through its exported API, and
// its benchmarks. They live in the external test package because they
// draw categories from rivalmix/sequential/synth, which imports
// sequential; the checks that need the internals (hand-assembled weights,
// the resamplers, the exact enumeration) are in exact_test.go.

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"runtime"
	"slices"
	"sync"
	"testing"
	"time"

	"rivalmix/sequential"
	"rivalmix/sequential/synth"
)

// overlapCategory is a small category whose posterior is genuinely
// uncertain: two of its three segments overlap (similar decay, different
// report rates), so co-segment probabilities are neither 0 nor 1 and the
// number of segments is in doubt. L = 6 keeps each datum short.
func overlapCategory(n int, seed uint64) []synth.Product {
	cfg := synth.Config{
		Category: "test", Products: n, Competitors: 6, FirstID: 1,
		Segments: []synth.SegmentSpec{
			{Name: "broad", A: 2, K: 2, S: 0.4, P: 0.6, Share: 0.4},
			{Name: "broad-sparse", A: 1.5, K: 1.8, S: 0.35, P: 0.35, Share: 0.3},
			{Name: "weak", A: 1, K: 1.5, S: 0.06, P: 0.25, Share: 0.3},
		},
	}
	return synth.Generate(cfg, rand.New(rand.NewPCG(seed, 99)))
}

// buildParticles adds the products one at a time, settling (default
// budget) after every fifth, then ends the refit: before the first build
// the adds only record the products and the settles do nothing, so the
// population comes from the batch chains of the build.
func buildParticles(t testing.TB, cfg sequential.ParticleConfig, products []synth.Product, seed uint64) *sequential.Particles {
	t.Helper()
	ps, err := sequential.NewParticles(cfg, seed, 1)
	if err != nil {
		t.Fatal(err)
	}
	for i := range products {
		if _, err := ps.Add(products[i].ID, products[i].Datum()); err != nil {
			t.Fatal(err)
		}
		if (i+1)%5 == 0 {
			ps.Settle()
		}
	}
	ps.SettleRefit()
	return ps
}

// posteriorView is what two particle systems on the same products are
// compared by: the co-segment probability of every pair (upper triangle,
// products in the order given) and the posterior of the number of
// segments.
type posteriorView struct {
	pairs []float64
	ks    map[int]float64
}

// viewOf summarises ps over the products ids, in that order.
func viewOf(t testing.TB, ps *sequential.Particles, ids []string) posteriorView {
	t.Helper()
	pos := map[string]int{}
	for j, id := range ps.Products() {
		pos[id] = j
	}
	idx := make([]int, len(ids))
	for i, id := range ids {
		j, ok := pos[id]
		if !ok {
			t.Fatalf("product %q missing", id)
		}
		idx[i] = j
	}
	draws := ps.Draws()
	top := math.Inf(-1)
	for _, d := range draws {
		top = math.Max(top, d.LogWeight)
	}
	v := posteriorView{pairs: make([]float64, len(ids)*(len(ids)-1)/2), ks: map[int]float64{}}
	total := 0.0
	for _, d := range draws {
		w := math.Exp(d.LogWeight - top)
		total += w
		k := 0
		for a := range idx {
			for b := a + 1; b < len(idx); b++ {
				if d.Labels[idx[a]] == d.Labels[idx[b]] {
					v.pairs[k] += w
				}
				k++
			}
		}
		seen := map[uint16]bool{}
		for _, j := range idx {
			seen[d.Labels[j]] = true
		}
		v.ks[len(seen)] += w
	}
	for k := range v.pairs {
		v.pairs[k] /= total
	}
	for k := range v.ks {
		v.ks[k] /= total
	}
	return v
}

// meanView averages views cell by cell.
func meanView(views []posteriorView) posteriorView {
	m := posteriorView{pairs: make([]float64, len(views[0].pairs)), ks: map[int]float64{}}
	f := 1 / float64(len(views))
	for _, v := range views {
		for k := range v.pairs {
			m.pairs[k] += f * v.pairs[k]
		}
		for k, p := range v.ks {
			m.ks[k] += f * p
		}
	}
	return m
}

// distance returns the mean absolute difference of co-segment
// probabilities and the total variation between the K posteriors.
func distance(a, b posteriorView) (mad, tvK float64) {
	for k := range a.pairs {
		mad += math.Abs(a.pairs[k] - b.pairs[k])
	}
	mad /= float64(len(a.pairs))
	for k, v := range a.ks {
		tvK += math.Abs(v - b.ks[k])
	}
	for k, v := range b.ks {
		if _, ok := a.ks[k]; !ok {
			tvK += v
		}
	}
	return mad, tvK / 2
}

func productIDs(products []synth.Product) []string {
	out := make([]string, len(products))
	for i := range products {
		out[i] = products[i].ID
	}
	return out
}

// reference is several independently seeded particle systems on the
// same products (the first 30 of a 31-product category; the last is kept
// for adding and removing): their disagreement measures the Monte Carlo
// spread that the checks below are judged against.
type reference struct {
	products []synth.Product // all 31; the systems hold the first len-1
	cfg      sequential.ParticleConfig
	views    []posteriorView
	mean     posteriorView
	// mad and tvK are the mean distances between two reference systems.
	mad, tvK float64
}

func refSize() (products, particles, systems int) {
	if testing.Short() {
		return 16, 128, 3
	}
	return 30, 400, 4
}

var (
	referenceOnce sync.Once
	referenceVal  *reference
)

// sharedReference builds the reference once, with the first caller's t
// reporting any failure; later callers fail if it could not be built.
func sharedReference(t *testing.T) *reference {
	t.Helper()
	referenceOnce.Do(func() {
		n, P, R := refSize()
		r := &reference{products: overlapCategory(n+1, 5)}
		r.cfg = sequential.DefaultParticleConfig()
		r.cfg.Particles = P
		held := r.products[:n]
		ids := productIDs(held)
		for s := 0; s < R; s++ {
			r.views = append(r.views, viewOf(t, buildParticles(t, r.cfg, held, uint64(101*(s+1))), ids))
		}
		pairs := 0.0
		for i := range r.views {
			for j := i + 1; j < len(r.views); j++ {
				mad, tvK := distance(r.views[i], r.views[j])
				r.mad += mad
				r.tvK += tvK
				pairs++
			}
		}
		r.mad /= pairs
		r.tvK /= pairs
		r.mean = meanView(r.views)
		referenceVal = r
	})
	if referenceVal == nil {
		t.Fatal("the shared reference systems could not be built")
	}
	return referenceVal
}

func (r *reference) held() []synth.Product { return r.products[:len(r.products)-1] }

// checkAgainstReference compares a view with the mean of the R reference
// views. Under the null the candidate differs from that mean by
// sqrt((1 + 1/R)/2) times, in expectation, what two references differ by
// (variances s^2 (1 + 1/R) against 2 s^2): 0.79 for R = 4. The mean
// absolute difference over all pairs is an average of hundreds of terms
// and varies little, so twice the references' mean distance is ample; the
// TV over K has few cells and a heavier tail, so three times. Floors
// (0.01 and 0.03) keep a chance near-agreement of the references from
// making the bound absurdly tight.
func checkAgainstReference(t *testing.T, what string, r *reference, got posteriorView) {
	t.Helper()
	mad, tvK := distance(got, r.mean)
	tolMAD := math.Max(2*r.mad, 0.01)
	tolK := math.Max(3*r.tvK, 0.03)
	t.Logf("%s: co-segment MAD %.4f (references %.4f, tol %.4f), TV of K %.4f (references %.4f, tol %.4f)",
		what, mad, r.mad, tolMAD, tvK, r.tvK, tolK)
	if !(mad <= tolMAD) {
		t.Errorf("%s: co-segment probabilities differ from the references by %.4f on average, tolerance %.4f", what, mad, tolMAD)
	}
	if !(tvK <= tolK) {
		t.Errorf("%s: posterior of K differs from the references by TV %.4f, tolerance %.4f\ngot %v\nref %v", what, tvK, tolK, got.ks, r.mean.ks)
	}
}

// TestAddRemoveMatchesReference builds a system on the reference
// products, adds one more product, settles, removes it and settles again
// with the default budget: the posterior of the others must be the one
// without it, and LogEvidence must come back to where it was (the two
// increments estimate log p(y | rest) and its negative).
//
// Two extras: one drawn from the category like the others (a routine
// delisting), and a distinctive one with five strong rivals that sits in
// a segment of its own. For the second, Remove's weight
// (N - 1 + alpha) / Z is dominated by the product's own segment, about
// m (N - 1 + alpha) / (alpha f(y | theta_own)), so it varies with 1/alpha
// and with the fit of theta_own by orders of magnitude across particles:
// the ESS collapses and resampling keeps a handful of states. A settle
// with the default budget moves only a few random others after a Remove
// and could not restore them (seeds 303-305 once gave TV of K 0.23, 0.04,
// 0.18 from the references), so Remove itself then runs RefitSweeps full
// passes, as at the end of a refit.
//
// Tolerance for the evidence: over seeds 303-306 the routine case came
// back within 0.05; each increment is a log weighted mean over P
// particles with ESS above P/2, and 0.25 is five times that spread.
func TestAddRemoveMatchesReference(t *testing.T) {
	t.Parallel()
	r := sharedReference(t)
	held := r.held()
	ids := productIDs(held)
	cases := []struct {
		name  string
		extra sequential.Datum
	}{
		{"routine product", r.products[len(r.products)-1].Datum()},
		{"distinctive product", sequential.MustDatum([]float64{1.1, 1.0, 0.95, 0.9, 0.85}, 6)},
	}
	for k, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			ps := buildParticles(t, r.cfg, held, uint64(303+k))
			e0 := ps.LogEvidence()
			lp, err := ps.Add("extra", c.extra)
			if err != nil {
				t.Fatal(err)
			}
			ps.Settle()
			mad, tvK := distance(viewOf(t, ps, ids), r.mean)
			t.Logf("while present: co-segment MAD %.4f, TV of K %.4f from the references; log predictive %.3f", mad, tvK, lp)
			if err := ps.Remove("extra"); err != nil {
				t.Fatal(err)
			}
			ps.Settle()
			if ps.Has("extra") || ps.Len() != len(ids) {
				t.Fatalf("after Remove: Has = %v, Len = %d", ps.Has("extra"), ps.Len())
			}
			checkAgainstReference(t, "add then remove", r, viewOf(t, ps, ids))
			d := ps.LogEvidence() - e0
			t.Logf("LogEvidence moved by %.3f over the Add and the Remove", d)
			// For the distinctive product both evidence increments rest on
			// the auxiliary-theta estimate of its new-segment predictive,
			// which is heavy-tailed when few base-measure draws fit it:
			// after Remove moved the evidence by the forward predictive, runs
			// gave -0.75 to -0.98. That case is held to 1.5 (a known
			// limitation, see the package doc), the routine one to 0.25.
			tol := 0.25
			if k == 1 {
				tol = 1.5
			}
			if !(math.Abs(d) <= tol) {
				t.Errorf("LogEvidence moved by %.3f over an Add and a Remove of the same product, want within %.2f of 0", d, tol)
			}
		})
	}
}

// TestReplaceSameDatumUnchanged replaces a third of the products by their
// own data (a refit that changed nothing), settling with the default
// budget after each: the posterior must not move.
func TestReplaceSameDatumUnchanged(t *testing.T) {
	t.Parallel()
	r := sharedReference(t)
	held := r.held()
	ids := productIDs(held)
	ps := buildParticles(t, r.cfg, held, 404)
	e0 := ps.LogEvidence()
	for i := 0; i < len(held); i += 3 {
		if _, err := ps.Replace(held[i].ID, held[i].Datum()); err != nil {
			t.Fatal(err)
		}
		ps.Settle()
	}
	checkAgainstReference(t, "replace by the same datum", r, viewOf(t, ps, ids))
	// Each Replace adds log of a weighted mean of Z_new/Z_old, an
	// estimate of log 1 = 0; ten of them with a few hundred particles
	// stay well within 0.5.
	if d := ps.LogEvidence() - e0; !(math.Abs(d) < 0.5) {
		t.Errorf("replacing data by themselves moved LogEvidence by %.4f", d)
	}
}

// script is a fixed sequence of operations on a category: adds with
// settles, refits (Replace with a redrawn datum), delistings (Remove) and
// new products that reuse the freed slots.
type script struct {
	products []synth.Product
	refits   []sequential.Datum
	steps    []func(*sequential.Particles) error
}

func newScript() *script {
	cfg := synth.Scenario()
	cfg.Products = 26
	src := rand.New(rand.NewPCG(8, 9))
	s := &script{products: synth.Generate(cfg, src)}
	for i := range s.products {
		p := s.products[i]
		synth.Redraw(cfg, &p, src)
		s.refits = append(s.refits, p.Datum())
	}
	add := func(i int) func(*sequential.Particles) error {
		return func(ps *sequential.Particles) error {
			_, err := ps.Add(s.products[i].ID, s.products[i].Datum())
			return err
		}
	}
	settle := func(ps *sequential.Particles) error { ps.Settle(); return nil }
	refitEnd := func(ps *sequential.Particles) error { ps.SettleRefit(); return nil }
	for i := 0; i < 20; i++ {
		s.steps = append(s.steps, add(i))
		if i%4 == 3 {
			s.steps = append(s.steps, settle)
		}
		if i == 9 {
			// The first ten products are only recorded; this builds the
			// population from batch chains, and the rest move it.
			s.steps = append(s.steps, refitEnd)
		}
	}
	for _, i := range []int{3, 7, 11, 2, 19} {
		s.steps = append(s.steps, func(ps *sequential.Particles) error {
			_, err := ps.Replace(s.products[i].ID, s.refits[i])
			return err
		})
	}
	s.steps = append(s.steps, settle)
	for _, i := range []int{5, 0, 13} {
		s.steps = append(s.steps, func(ps *sequential.Particles) error { return ps.Remove(s.products[i].ID) })
	}
	for i := 20; i < 26; i++ {
		s.steps = append(s.steps, add(i))
	}
	s.steps = append(s.steps, refitEnd)
	s.steps = append(s.steps, settle, func(ps *sequential.Particles) error {
		ps.SetRejuvenation(3, 0.5)
		ps.Settle()
		return nil
	})
	return s
}

func (s *script) run(t *testing.T, ps *sequential.Particles, from, to int) {
	t.Helper()
	for j := from; j < to; j++ {
		if err := s.steps[j](ps); err != nil {
			t.Fatalf("step %d: %v", j, err)
		}
	}
}

// scriptConfig resamples often (ESS below 0.9 P) so that resampling,
// label sharing and copy-on-write are all exercised.
func scriptConfig(workers int, r sequential.Resampler) sequential.ParticleConfig {
	cfg := sequential.DefaultParticleConfig()
	cfg.Particles = 48
	if testing.Short() {
		cfg.Particles = 24
	}
	cfg.ESSFraction = 0.9
	cfg.Resampler = r
	cfg.Workers = workers
	return cfg
}

func runScript(t *testing.T, s *script, cfg sequential.ParticleConfig) []byte {
	t.Helper()
	ps, err := sequential.NewParticles(cfg, 12, 34)
	if err != nil {
		t.Fatal(err)
	}
	s.run(t, ps, 0, len(s.steps))
	if ps.Diversity() == cfg.Particles {
		t.Fatalf("the script never resampled (diversity %d): it does not exercise resampling", ps.Diversity())
	}
	return ps.Encode()
}

// TestDeterminism checks the reproducibility contract of model section 4:
// the same seed and the same operations give the same bytes, whether run
// twice, interrupted by Encode and DecodeParticles at any of several
// points, or run over one or two workers; for both resamplers, and with
// Replaces that keep assignments.
func TestDeterminism(t *testing.T) {
	t.Parallel()
	s := newScript()
	for _, tc := range []struct {
		name    string
		r       sequential.Resampler
		keepESS float64
	}{
		{"systematic", sequential.Systematic, 0},
		{"residual", sequential.Residual, 0},
		{"systematic-keeping", sequential.Systematic, 0.5},
	} {
		r := tc.r
		config := func(workers int) sequential.ParticleConfig {
			c := scriptConfig(workers, r)
			c.KeepESS = tc.keepESS
			return c
		}
		t.Run(tc.name, func(t *testing.T) {
			want := runScript(t, s, config(1))
			if two := runScript(t, s, config(2)); !bytes.Equal(two, want) {
				t.Errorf("Workers 2 gives an encoding different from Workers 1")
			}
			if tc.keepESS > 0 {
				ps, err := sequential.NewParticles(config(2), 12, 34)
				if err != nil {
					t.Fatal(err)
				}
				s.run(t, ps, 0, len(s.steps))
				if kept, redrawn := ps.ReplaceForms(); kept == 0 || redrawn == 0 {
					t.Fatalf("%d Replaces kept, %d redrew: the script should exercise both forms", kept, redrawn)
				}
			}
			if testing.Short() && tc.name != "systematic" {
				return // -short: the repeat and the interruptions for one case only
			}
			if again := runScript(t, s, config(1)); !bytes.Equal(again, want) {
				t.Errorf("same seed, same operations: encodings differ")
			}
			cuts := []int{0, 9, 25, 27, 31, len(s.steps)}
			if testing.Short() {
				cuts = []int{27}
			}
			for _, cut := range cuts {
				ps, err := sequential.NewParticles(config(1), 12, 34)
				if err != nil {
					t.Fatal(err)
				}
				s.run(t, ps, 0, cut)
				resumed, err := sequential.DecodeParticles(ps.Encode(), 2)
				if err != nil {
					t.Fatalf("decode at step %d: %v", cut, err)
				}
				s.run(t, resumed, cut, len(s.steps))
				if !bytes.Equal(resumed.Encode(), want) {
					t.Errorf("Encode/DecodeParticles after step %d of %d, then the rest: encoding differs from the uninterrupted run", cut, len(s.steps))
				}
			}
		})
	}
}

// TestDeterminismGOMAXPROCS runs the script with Workers = 0 (one worker
// per GOMAXPROCS) under GOMAXPROCS 1 and 2: the bytes must agree. Not
// parallel: it changes a process-wide setting.
func TestDeterminismGOMAXPROCS(t *testing.T) {
	prev := runtime.GOMAXPROCS(0)
	t.Cleanup(func() { runtime.GOMAXPROCS(prev) })
	s := newScript()
	runtime.GOMAXPROCS(1)
	one := runScript(t, s, scriptConfig(0, sequential.Systematic))
	runtime.GOMAXPROCS(2)
	two := runScript(t, s, scriptConfig(0, sequential.Systematic))
	if !bytes.Equal(one, two) {
		t.Errorf("GOMAXPROCS 1 and 2 give different encodings")
	}
}

// TestDecodeKeepsDraws checks that a system restored from its encoding
// answers Draws (and so every summary) as the original did: a restart of
// the service between a settle and the next query must not change the
// published posterior.
func TestDecodeKeepsDraws(t *testing.T) {
	t.Parallel()
	s := newScript()
	ps, err := sequential.NewParticles(scriptConfig(1, sequential.Systematic), 12, 34)
	if err != nil {
		t.Fatal(err)
	}
	s.run(t, ps, 0, len(s.steps))
	want := ps.Draws()
	restored, err := sequential.DecodeParticles(ps.Encode(), 1)
	if err != nil {
		t.Fatal(err)
	}
	got := restored.Draws()
	if len(got) != len(want) {
		t.Fatalf("restored system gives %d draws, the original %d", len(got), len(want))
	}
	for d := range want {
		g, w := got[d], want[d]
		same := g.LogWeight == w.LogWeight && g.Alpha == w.Alpha && len(g.Labels) == len(w.Labels)
		for i := 0; same && i < len(w.Labels); i++ {
			same = g.Labels[i] == w.Labels[i]
		}
		if !same {
			t.Fatalf("draw %d differs after Encode/DecodeParticles", d)
		}
	}
}

// smallEncoding returns the encoding of a small system with removed
// products, shared label buffers and pending touched products.
func smallEncoding(t testing.TB) []byte {
	t.Helper()
	cfg := sequential.DefaultParticleConfig()
	cfg.Particles = 6
	cfg.ESSFraction = 0.9
	cfg.KeepESS = 0.5
	ps, err := sequential.NewParticles(cfg, 3, 4)
	if err != nil {
		t.Fatal(err)
	}
	products := overlapCategory(8, 17)
	for i := range products {
		if _, err := ps.Add(products[i].ID, products[i].Datum()); err != nil {
			t.Fatal(err)
		}
	}
	ps.Settle()
	if err := ps.Remove(products[2].ID); err != nil {
		t.Fatal(err)
	}
	if _, err := ps.Replace(products[4].ID, products[5].Datum()); err != nil {
		t.Fatal(err)
	}
	return ps.Encode()
}

// decodeRecover calls DecodeParticles and turns a panic into a value.
func decodeRecover(b []byte) (ps *sequential.Particles, err error, panicked any) {
	defer func() { panicked = recover() }()
	ps, err = sequential.DecodeParticles(b, 1)
	return ps, err, nil
}

// TestDecodeParticlesErrors checks that DecodeParticles refuses, with an
// error wrapping ErrEncoding, every truncation of a valid encoding (what
// a partly written file looks like), a wrong version byte and trailing
// bytes, and accepts the encoding itself.
func TestDecodeParticlesErrors(t *testing.T) {
	t.Parallel()
	b := smallEncoding(t)
	if _, err := sequential.DecodeParticles(b, 1); err != nil {
		t.Fatalf("valid encoding: %v", err)
	}
	var panics []int
	for n := 0; n < len(b); n++ {
		_, err, p := decodeRecover(b[:n])
		switch {
		case p != nil:
			if len(panics) == 0 {
				t.Errorf("truncated to %d of %d bytes: DecodeParticles panicked: %v", n, len(b), p)
			}
			panics = append(panics, n)
		case !errors.Is(err, sequential.ErrEncoding):
			t.Errorf("truncated to %d of %d bytes: err = %v, want ErrEncoding", n, len(b), err)
		}
	}
	if len(panics) > 0 {
		t.Errorf("%d of %d truncations panicked, at lengths %v", len(panics), len(b), panics)
	}
	for _, v := range []byte{0, 5, 255} {
		bad := append([]byte{v}, b[1:]...)
		if _, err, p := decodeRecover(bad); p != nil || !errors.Is(err, sequential.ErrEncoding) {
			t.Errorf("version byte %d: err = %v, panic %v; want ErrEncoding", v, err, p)
		}
	}
	for _, tail := range [][]byte{{0}, {1, 2, 3}} {
		long := append(append([]byte(nil), b...), tail...)
		if _, err, p := decodeRecover(long); p != nil || !errors.Is(err, sequential.ErrEncoding) {
			t.Errorf("%d trailing bytes: err = %v, panic %v; want ErrEncoding", len(tail), err, p)
		}
	}
}

// keepESSOffset returns the offset of the keep-ess float in a version-3
// encoding: after the version and flag bytes, the uvarints aux and
// particles, the ess fraction, the uvarints resampler and sweeps, the
// random share, and the uvarints refit sweeps and keep sweeps.
func keepESSOffset(t *testing.T, b []byte) int {
	t.Helper()
	off := 2
	for _, isFloat := range []bool{false, false, true, false, false, true, false, false} {
		if isFloat {
			off += 8
			continue
		}
		_, n := binary.Uvarint(b[off:])
		if n <= 0 {
			t.Fatalf("bad uvarint at %d", off)
		}
		off += n
	}
	return off
}

// TestDecodeOlderVersions reads state written before the waste-free
// updater: testdata/particles-v3-small.bin and particles-v3-refit.bin are
// version-3 encodings written by the release before it (the first the
// small system of smallEncoding, built by adds with a Remove and a
// Replace after its settle; the second 30 products after a refit-end
// settle, with kept draws), and versions 2 and 1 are derived from the
// first (version 2 has no keep-ess setting, version 1 no
// resampled-since-settle byte either). Each must decode as a built system
// holding the same products and data, with the new settings at their
// defaults, keep-ess 0 below version 3, and go on: a Replace and a
// refit end, then a summary, then Encode and Decode again.
func TestDecodeOlderVersions(t *testing.T) {
	t.Parallel()
	b, err := os.ReadFile("testdata/particles-v3-small.bin")
	if err != nil {
		t.Fatal(err)
	}
	if b[0] != 3 {
		t.Fatalf("encoding version %d, want 3", b[0])
	}
	off := keepESSOffset(t, b)
	if got := math.Float64frombits(binary.LittleEndian.Uint64(b[off:])); got != 0.5 {
		t.Fatalf("keep ess read at offset %d = %v, want smallEncoding's 0.5", off, got)
	}
	head, tail := b[2:off], b[off+8:]
	join := func(parts ...[]byte) []byte { return bytes.Join(parts, nil) }
	products := overlapCategory(8, 17)
	check := func(name string, enc []byte, keepESS float64) {
		t.Helper()
		ps, err := sequential.DecodeParticles(enc, 1)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if !ps.Built() || ps.Len() != 7 || ps.NumParticles() != 6 {
			t.Fatalf("%s: built %v, %d products, %d particles; want built, 7, 6", name, ps.Built(), ps.Len(), ps.NumParticles())
		}
		data := ps.Data()
		for j, id := range ps.Products() {
			i := slices.IndexFunc(products, func(p synth.Product) bool { return p.ID == id })
			if i < 0 || i == 2 {
				t.Fatalf("%s: unexpected product %q", name, id)
			}
			want := products[i].Datum()
			if i == 4 {
				want = products[5].Datum()
			}
			if !slices.Equal(data[j].Values(), want.Values()) || data[j].L() != want.L() {
				t.Errorf("%s: product %s holds %v, want %v", name, id, data[j].Values(), want.Values())
			}
		}
		re, err := sequential.DecodeParticles(ps.Encode(), 1)
		if err != nil {
			t.Fatalf("%s: re-encoded: %v", name, err)
		}
		if !bytes.Equal(re.Encode(), ps.Encode()) {
			t.Errorf("%s: Encode, Decode, Encode changed the bytes", name)
		}
		if err := ps.SetKeepESS(keepESS); err != nil {
			t.Fatal(err)
		}
		// The setting decoded must be keepESS: setting it again changes nothing.
		if !bytes.Equal(ps.Encode(), re.Encode()) {
			t.Errorf("%s: keep ess decoded is not %v", name, keepESS)
		}
		if _, err := ps.Replace(products[0].ID, products[1].Datum()); err != nil {
			t.Fatalf("%s: Replace: %v", name, err)
		}
		ps.SettleRefit()
		if _, err := ps.Summary(sequential.DefaultSummaryOptions()); err != nil {
			t.Fatalf("%s: summary after the refit end: %v", name, err)
		}
		if _, err := sequential.DecodeParticles(ps.Encode(), 1); err != nil {
			t.Fatalf("%s: after going on: %v", name, err)
		}
	}
	check("version 3", b, 0.5)
	for _, flag := range []byte{0, 1} {
		check(fmt.Sprintf("version 2, flag %d", flag), join([]byte{2, flag}, head, tail), 0)
	}
	check("version 1", join([]byte{1}, head, tail), 0)
	if _, err := sequential.DecodeParticles(join([]byte{3, 2}, head, b[off:off+8], tail), 1); !errors.Is(err, sequential.ErrEncoding) {
		t.Errorf("flag byte 2: err = %v, want ErrEncoding", err)
	}
	bad := join([]byte{3, 0}, head, binary.LittleEndian.AppendUint64(nil, math.Float64bits(1.5)), tail)
	if _, err := sequential.DecodeParticles(bad, 1); !errors.Is(err, sequential.ErrEncoding) {
		t.Errorf("keep ess 1.5: err = %v, want ErrEncoding", err)
	}

	refit, err := os.ReadFile("testdata/particles-v3-refit.bin")
	if err != nil {
		t.Fatal(err)
	}
	ps, err := sequential.DecodeParticles(refit, 1)
	if err != nil {
		t.Fatalf("version 3 with kept draws: %v", err)
	}
	if ps.Len() != 30 || ps.NumParticles() != 16 || !ps.Built() {
		t.Fatalf("version 3 with kept draws: %d products, %d particles, built %v", ps.Len(), ps.NumParticles(), ps.Built())
	}
	if _, err := ps.Summary(sequential.DefaultSummaryOptions()); err != nil {
		t.Fatalf("version 3 with kept draws: summary: %v", err)
	}
	ps.SettleRefit()
	if d := ps.Draws(); d[0].Soft == nil {
		t.Error("after a refit end the draws carry no placement records")
	}
}

// checkDecodeNoPanic is the property of the fuzz target: DecodeParticles
// returns either an error wrapping ErrEncoding or a system whose own
// encoding decodes again.
func checkDecodeNoPanic(t *testing.T, b []byte) {
	t.Helper()
	ps, err := sequential.DecodeParticles(b, 1)
	if err != nil {
		if !errors.Is(err, sequential.ErrEncoding) {
			t.Fatalf("error %v does not wrap ErrEncoding", err)
		}
		return
	}
	if _, err := sequential.DecodeParticles(ps.Encode(), 1); err != nil {
		t.Fatalf("accepted input re-encodes to bytes that do not decode: %v", err)
	}
}

// TestDecodeParticlesCorruption flips, overwrites and splices bytes of a
// valid encoding at seeded random places: DecodeParticles must never
// panic.
func TestDecodeParticlesCorruption(t *testing.T) {
	t.Parallel()
	b := smallEncoding(t)
	trials := 3000
	if testing.Short() {
		trials = 600
	}
	src := rand.New(rand.NewPCG(77, 78))
	for k := 0; k < trials; k++ {
		c := append([]byte(nil), b...)
		switch k % 3 {
		case 0: // one to three bit flips
			for f := 0; f <= src.IntN(3); f++ {
				c[src.IntN(len(c))] ^= 1 << src.IntN(8)
			}
		case 1: // one byte overwritten
			c[src.IntN(len(c))] = byte(src.IntN(256))
		default: // a run of bytes deleted
			at := src.IntN(len(c))
			c = append(c[:at], c[min(len(c), at+1+src.IntN(8)):]...)
		}
		func() {
			defer func() {
				if r := recover(); r != nil {
					t.Fatalf("trial %d: DecodeParticles panicked: %v", k, r)
				}
			}()
			checkDecodeNoPanic(t, c)
		}()
	}
}

// TestDecodeParticlesNoLabelBuffers hand-crafts an encoding of a
// one-particle system with no products whose label-buffer count is 0:
// the decoder bounds the particle's buffer index by len(buffers)-1 = -1,
// which as an unsigned limit accepts anything, and then indexes the empty
// buffer list. It must report ErrEncoding instead of panicking.
//
// The layout (encode.go, version 1) ends, for such a system, with: slot,
// free and touched counts (0, 0, 0), buffer count 1, buffer length 0,
// particle count 1, log weight (8 bytes), origin 0, alpha (8 bytes),
// buffer index 0, segment count 0, free-segment count 0, kept-draws flag
// 0: 27 bytes.
func TestDecodeParticlesNoLabelBuffers(t *testing.T) {
	t.Parallel()
	cfg := sequential.DefaultParticleConfig()
	cfg.Particles = 1
	ps, err := sequential.NewParticles(cfg, 1, 2)
	if err != nil {
		t.Fatal(err)
	}
	b := ps.Encode()
	tail := len(b) - 27
	if tail < 1 || !bytes.Equal(b[tail:tail+6], []byte{0, 0, 0, 1, 0, 1}) {
		t.Fatalf("encoding layout changed (tail % x); update this test", b[max(0, tail):])
	}
	crafted := append(append(append([]byte(nil), b[:tail+3]...), 0), b[tail+5:]...)
	defer func() {
		if r := recover(); r != nil {
			t.Errorf("DecodeParticles panicked on a zero label-buffer count: %v", r)
		}
	}()
	if _, err := sequential.DecodeParticles(crafted, 1); !errors.Is(err, sequential.ErrEncoding) {
		t.Errorf("zero label buffers: err = %v, want ErrEncoding", err)
	}
}

// FuzzDecodeParticles: decoding arbitrary bytes must never panic (seeded
// with a valid encoding, an empty system and a truncation).
func FuzzDecodeParticles(f *testing.F) {
	b := smallEncoding(f)
	f.Add(b)
	f.Add(b[:len(b)/2])
	cfg := sequential.DefaultParticleConfig()
	cfg.Particles = 1
	ps, err := sequential.NewParticles(cfg, 1, 2)
	if err != nil {
		f.Fatal(err)
	}
	f.Add(ps.Encode())
	f.Fuzz(func(t *testing.T, data []byte) {
		checkDecodeNoPanic(t, data)
	})
}

// benchSystem builds (once per size and kind of refit) a system of
// P = 256 on n products of the demo scenario and returns its encoding,
// plus refits: fresh draws of every product from its segment (drift 0,
// the hardest case), or re-estimates of every product's competitors with
// log-scale noise of sd drift (synth.Sequence.Drift), as the next refits
// of the category would bring.
type benchSystem struct {
	encoding []byte
	ids      []string
	refits   [][]sequential.Datum
	build    time.Duration
}

var benchSystems sync.Map // n/refits/drift -> *benchSystem

func getBenchSystem(b *testing.B, n, refits int, drift float64) *benchSystem {
	b.Helper()
	key := fmt.Sprint(n, "/", refits, "/", drift)
	if v, ok := benchSystems.Load(key); ok {
		return v.(*benchSystem)
	}
	start := time.Now()
	cfg := synth.Scenario()
	cfg.Products = n
	seq := synth.NewSequence(cfg, refits+1, 0, rand.New(rand.NewPCG(uint64(n), 5)))
	seq.Drift = drift
	bs := &benchSystem{}
	first := seq.Refit(0)
	pc := sequential.DefaultParticleConfig()
	pc.Workers = 2
	ps, err := sequential.NewParticles(pc, 1, 2)
	if err != nil {
		b.Fatal(err)
	}
	// The adds only record the products; the refit end builds the
	// population from batch chains, as a new category's first refit does.
	for i := range first {
		bs.ids = append(bs.ids, first[i].ID)
		if _, err := ps.Add(first[i].ID, first[i].Datum()); err != nil {
			b.Fatal(err)
		}
	}
	ps.SettleRefit()
	bs.encoding = ps.Encode()
	for r := 1; r <= refits; r++ {
		prods := seq.Refit(r)
		ds := make([]sequential.Datum, len(prods))
		for i := range prods {
			ds[i] = prods[i].Datum()
		}
		bs.refits = append(bs.refits, ds)
	}
	bs.build = time.Since(start)
	benchSystems.Store(key, bs)
	return bs
}

func (bs *benchSystem) decode(b *testing.B, workers int) *sequential.Particles {
	b.Helper()
	ps, err := sequential.DecodeParticles(bs.encoding, workers)
	if err != nil {
		b.Fatal(err)
	}
	return ps
}

// reportFootprint reports the memory of the particle states per particle
// per product (distinct label buffers at 2 bytes a slot plus segment
// records), and separately that of the draws kept for the summaries.
func reportFootprint(b *testing.B, ps *sequential.Particles) {
	lab, seg, kept := ps.FootprintForTest()
	per := float64(ps.NumParticles() * ps.Len())
	b.ReportMetric(float64(lab+seg)/per, "B/particle/product")
	b.ReportMetric(float64(kept)/per, "kept-B/particle/product")
}

// benchDrift is the log-scale noise of the re-estimating refits of the
// benchmarks (synth.Sequence.Drift).
const benchDrift = 0.1

// benchDecode decodes the bench system of n products for drift with the
// given workers and KeepESS.
func benchDecode(b *testing.B, n int, drift float64, workers int, keepESS float64) (*sequential.Particles, *benchSystem) {
	bs := getBenchSystem(b, n, 2, drift)
	ps := bs.decode(b, workers)
	if err := ps.SetKeepESS(keepESS); err != nil {
		b.Fatal(err)
	}
	return ps, bs
}

// benchKeepESS is the KeepESS of the "-keeping" sub-benchmarks, which
// show what keeping assignments saves (the default, 0, always redraws).
const benchKeepESS = 0.9

// BenchmarkReplace measures one Replace (a refit of one product) on
// P = 256 particles over 1,000 products with one worker. Settles run every
// 256 replaces, as the service would, but outside the timer. This and the
// next two benchmarks run three cases: refits that redraw every product,
// refits that re-estimate them (benchDrift), and the re-estimates with
// KeepESS = benchKeepESS, so that a Replace keeps the assignments when its
// weights allow.
func BenchmarkReplace(b *testing.B) {
	b.Run("redraw", func(b *testing.B) { benchReplace(b, 0, 0) })
	b.Run("reestimate", func(b *testing.B) { benchReplace(b, benchDrift, 0) })
	b.Run("reestimate-keeping", func(b *testing.B) { benchReplace(b, benchDrift, benchKeepESS) })
}

func benchReplace(b *testing.B, drift, keepESS float64) {
	ps, _ := benchDecode(b, 1000, drift, 1, keepESS)
	benchReplaceLatency(b, drift, keepESS, ps, nil)
}

// benchReplaceLatency times b.N Replaces on ps (the bench system of 1,000
// products), each followed by after when it is not nil, and reports the
// mean and the 50th and 99th percentiles of a change's time. Without
// after, a settle runs every 256 replaces outside the timer.
func benchReplaceLatency(b *testing.B, drift, keepESS float64, ps *sequential.Particles, after func()) {
	bs := getBenchSystem(b, 1000, 2, drift)
	n := len(bs.ids)
	lat := make([]time.Duration, 0, b.N)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if after == nil && i > 0 && i%256 == 0 {
			b.StopTimer()
			ps.Settle()
			b.StartTimer()
		}
		t0 := time.Now()
		if _, err := ps.Replace(bs.ids[i%n], bs.refits[(i/n)%2][i%n]); err != nil {
			b.Fatal(err)
		}
		if after != nil {
			after()
		}
		lat = append(lat, time.Since(t0))
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/change")
	// The median leaves out the few changes that also resample or renew
	// the population; the mean above includes them.
	slices.Sort(lat)
	b.ReportMetric(float64(lat[len(lat)/2].Nanoseconds())/1e6, "p50-ms")
	b.ReportMetric(float64(lat[len(lat)*99/100].Nanoseconds())/1e6, "p99-ms")
}

// BenchmarkSingleChange measures one product's change as a stream of
// single changes needs it to stay right: a Replace and a Settle (which
// runs a waste-free step whenever the diversity watch calls for one), on
// P = 256 particles over 1,000 products with one worker, and reports the
// median and the 99th percentile over the changes as well as how many
// waste-free steps the watch ran.
func BenchmarkSingleChange(b *testing.B) {
	b.Run("redraw", func(b *testing.B) { benchSingleChange(b, 0, 0) })
	b.Run("reestimate", func(b *testing.B) { benchSingleChange(b, benchDrift, 0) })
	b.Run("reestimate-keeping", func(b *testing.B) { benchSingleChange(b, benchDrift, benchKeepESS) })
}

func benchSingleChange(b *testing.B, drift, keepESS float64) {
	var steps uint64
	ps, _ := benchDecode(b, 1000, drift, 1, keepESS)
	start := ps.LastStep().Seq
	benchReplaceLatency(b, drift, keepESS, ps, func() { ps.Settle() })
	steps = ps.LastStep().Seq - start
	b.ReportMetric(float64(steps), "waste-free-steps")
}

// BenchmarkReplaceWithSettle is BenchmarkReplace with the settle (default
// budget: two passes over the touched products plus half as many others,
// the kernels of the segments they touched, and alpha) every 256 replaces
// inside the timer.
func BenchmarkReplaceWithSettle(b *testing.B) {
	b.Run("redraw", func(b *testing.B) { benchReplaceWithSettle(b, 0, 0) })
	b.Run("reestimate", func(b *testing.B) { benchReplaceWithSettle(b, benchDrift, 0) })
	b.Run("reestimate-keeping", func(b *testing.B) { benchReplaceWithSettle(b, benchDrift, benchKeepESS) })
}

func benchReplaceWithSettle(b *testing.B, drift, keepESS float64) {
	ps, bs := benchDecode(b, 1000, drift, 1, keepESS)
	n := len(bs.ids)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if i > 0 && i%256 == 0 {
			ps.SettleInRefit()
		}
		if _, err := ps.Replace(bs.ids[i%n], bs.refits[(i/n)%2][i%n]); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/replace")
	reportFootprint(b, ps)
}

// BenchmarkRefit5000 measures a whole weekly refit of a 5,000-product
// category on P = 256 particles with two workers: every product replaced
// with a settle every 256, then the refit-end rejuvenation (reported
// separately as refit-end-s). It also reports the memory the particle
// states hold per particle per product after the refit.
func BenchmarkRefit5000(b *testing.B) {
	def := sequential.DefaultParticleConfig().Sweeps
	b.Run("redraw", func(b *testing.B) { benchRefit5000(b, 0, 0, def) })
	b.Run("reestimate", func(b *testing.B) { benchRefit5000(b, benchDrift, 0, def) })
	b.Run("reestimate-keeping", func(b *testing.B) { benchRefit5000(b, benchDrift, benchKeepESS, def) })
	// The lightest settings: keeping, and no rejuvenation at the
	// micro-batch settles (the service's batch_sweeps 0).
	b.Run("reestimate-light", func(b *testing.B) { benchRefit5000(b, benchDrift, benchKeepESS, 0) })
}

// benchRefit5000 runs the refit with the given KeepESS and micro-batch
// rejuvenation sweeps.
func benchRefit5000(b *testing.B, drift, keepESS float64, sweeps int) {
	ps, bs := benchDecode(b, 5000, drift, 2, keepESS)
	ps.SetRejuvenation(sweeps, sequential.DefaultParticleConfig().RandomShare)
	b.Logf("building the 5,000-product system took %v", bs.build)
	b.ResetTimer()
	var end time.Duration
	for i := 0; i < b.N; i++ {
		refit := bs.refits[i%2]
		// As the service runs it: a settle in the open refit after every
		// 256 changes, and the refit-end rejuvenation (SettleRefit) when
		// the refit completes.
		for j, id := range bs.ids {
			if _, err := ps.Replace(id, refit[j]); err != nil {
				b.Fatal(err)
			}
			if (j+1)%256 == 0 {
				ps.SettleInRefit()
			}
		}
		t0 := time.Now()
		ps.SettleRefit()
		end += time.Since(t0)
	}
	b.ReportMetric(b.Elapsed().Seconds()/float64(b.N), "s/refit")
	b.ReportMetric(end.Seconds()/float64(b.N), "refit-end-s")
	reportFootprint(b, ps)
}
