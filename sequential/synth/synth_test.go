package synth

import (
	"cmp"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

// TestPerturbKeepsCompetitors checks a re-estimating refit: every
// competitor keeps its id, the vector stays sorted, the report count
// stays, the previous vector is left as it was, and the log ratio of a
// competitor's new to old value has mean 0 and the given spread.
func TestPerturbKeepsCompetitors(t *testing.T) {
	cfg := Scenario()
	cfg.Products = 2000
	src := rand.New(rand.NewPCG(3, 4))
	ps := Generate(cfg, src)
	const sd = 0.1
	var sum, sumSq float64
	count := 0
	for i := range ps {
		p := &ps[i]
		oldLatent, oldRivals := slices.Clone(p.Latent), slices.Clone(p.Rivals)
		oldReported := p.Reported
		oldN := len(p.Reported)
		before := map[string]float64{}
		for j, id := range p.Rivals {
			before[id] = p.Latent[j]
		}
		Perturb(p, sd, src)
		if len(p.Reported) != oldN || len(p.Latent) != len(oldLatent) {
			t.Fatalf("%s: sizes changed: n %d -> %d, L %d -> %d", p.ID, oldN, len(p.Reported), len(oldLatent), len(p.Latent))
		}
		if !slices.Equal(oldReported, oldLatent[:oldN]) {
			t.Fatalf("%s: Perturb wrote into the previous vector", p.ID)
		}
		if !slices.IsSortedFunc(p.Latent, func(a, b float64) int { return cmp.Compare(b, a) }) {
			t.Fatalf("%s: latent vector not descending: %v", p.ID, p.Latent)
		}
		if !slices.Equal(p.Reported, p.Latent[:oldN]) {
			t.Fatalf("%s: reported values are not the top %d", p.ID, oldN)
		}
		a, b := slices.Clone(oldRivals), slices.Clone(p.Rivals)
		slices.Sort(a)
		slices.Sort(b)
		if !slices.Equal(a, b) {
			t.Fatalf("%s: competitor ids changed", p.ID)
		}
		for j, id := range p.Rivals {
			r := math.Log(p.Latent[j] / before[id])
			sum += r
			sumSq += r * r
			count++
		}
	}
	mean := sum / float64(count)
	sdHat := math.Sqrt(sumSq/float64(count) - mean*mean)
	// 20,000 normal log ratios: the mean's standard error is 0.1/141 =
	// 0.0007, the sd's about 0.0005.
	if math.Abs(mean) > 0.004 || math.Abs(sdHat-sd) > 0.004 {
		t.Errorf("log ratios: mean %.4f (want 0), sd %.4f (want %.2f)", mean, sdHat, sd)
	}
}

// TestSequenceDrift checks that a re-estimating sequence keeps non-switching
// products near their previous values and redraws the switching ones
// from their new segment.
func TestSequenceDrift(t *testing.T) {
	cfg := Scenario()
	src := rand.New(rand.NewPCG(5, 6))
	seq := NewSequence(cfg, 2, 0.2, src)
	seq.Drift = 0.05
	first := seq.Refit(0)
	prevSeg := make([]int, len(first))
	prevTop := make([]float64, len(first))
	for i := range first {
		prevSeg[i] = first[i].Segment
		prevTop[i] = first[i].Latent[0]
	}
	moved := 0
	for i, p := range seq.Refit(1) {
		if seq.Switched[i] {
			if p.Segment == prevSeg[i] {
				t.Errorf("%s: switching product kept segment %d", p.ID, p.Segment)
			}
			moved++
			continue
		}
		// The top value is the largest of L values each moved by a
		// factor exp(0.05 e): it moves by at most the largest factor,
		// below exp(0.05 * 6) for 3,000 normal draws.
		if r := math.Abs(math.Log(p.Latent[0] / prevTop[i])); r > 0.3 {
			t.Errorf("%s: top value moved by a log ratio of %.3f", p.ID, r)
		}
	}
	if moved != 60 {
		t.Errorf("%d products switched, want 20%% of 300 = 60", moved)
	}
}
