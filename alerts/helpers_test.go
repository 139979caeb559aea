package alerts

import (
	"math"
	"testing"

	"rivalmix/sequential"
)

// hand describes one product of a hand-built refit.
type hand struct {
	id  string
	seg int       // point segment index
	mem []float64 // membership row; nil means 1 in seg and 0 elsewhere
	p   float64   // P(next value > 0.25)
	all bool      // every candidate reported (no next value)
}

// handRefit builds a Refit with k point segments from hand-written
// products, as sequential.Summarize would shape it: L = 10, two reported
// values (0.9, 0.4) unless all, segment decay summaries with
// MeanReported = 3 + segment index.
func handRefit(t *testing.T, refit string, k int, prods []hand) Refit {
	t.Helper()
	r := Refit{Category: "breakfast-cereal", Refit: refit, ESS: 100, Particles: 128, Diversity: 40, MeanSurprise: 3.5}
	r.Summary.Segments = make([]sequential.SegmentSummary, k)
	for c := range r.Summary.Segments {
		r.Summary.Segments[c] = sequential.SegmentSummary{Median: [3]float64{0.6, 0.35, 0.2}, MeanReported: 3 + float64(c)}
	}
	for i, h := range prods {
		r.Products = append(r.Products, h.id)
		values := []float64{0.9, 0.4}
		if h.all {
			values = []float64{0.9, 0.8, 0.7, 0.6, 0.5, 0.4, 0.3, 0.2, 0.1, 0.05}
		}
		d := sequential.MustDatum(values, 10)
		r.Data = append(r.Data, &d)
		r.Summary.Partition = append(r.Summary.Partition, h.seg)
		r.Summary.Segments[h.seg].Members = append(r.Summary.Segments[h.seg].Members, i)
		mem := h.mem
		if mem == nil {
			mem = make([]float64, k)
			mem[h.seg] = 1
		}
		r.Summary.Membership = append(r.Summary.Membership, mem)
		next := sequential.NextSummary{Defined: !h.all, Threshold: 0.25}
		if h.all {
			next.Median, next.Lo, next.Hi = math.NaN(), math.NaN(), math.NaN()
		} else {
			next.PExceed, next.Median, next.Lo, next.Hi = h.p, 0.24, 0.12, 0.36
		}
		r.Summary.Next = append(r.Summary.Next, next)
	}
	return r
}

// byKind returns the events of one kind.
func byKind(events []Event, kind Kind) []Event {
	var out []Event
	for _, e := range events {
		if e.Kind == kind {
			out = append(out, e)
		}
	}
	return out
}

// mustEvaluate runs Evaluate and fails the test on error.
func mustEvaluate(t *testing.T, cfg Config, prev Memory, r Refit) Outcome {
	t.Helper()
	out, err := Evaluate(cfg, prev, r)
	if err != nil {
		t.Fatalf("refit %s: %v", r.Refit, err)
	}
	return out
}

// members returns n hand products named prefix+"a", prefix+"b", ... in
// point segment seg.
func members(prefix string, n, seg int) []hand {
	out := make([]hand, n)
	for i := range out {
		out[i] = hand{id: prefix + string(rune('a'+i)), seg: seg}
	}
	return out
}
