// Package synth draws fictional product categories from the rivalmix
// model with known segments, for tests, demos and load generation.
//
// The scenario is invented: Larkfield Grocers, a made-up retailer, and its
// breakfast-cereal category. Product ids (P-1001, ...) name no real
// product. Everything is drawn from a caller's random source; the package
// does no I/O.
package synth

import (
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"sort"

	"rivalmix/sequential"
)

// SegmentSpec is one true segment: the exponentiated Weibull kernel of its
// latent relative cross-elasticities, the chance P that a candidate
// competitor is reported, and its share of the products.
type SegmentSpec struct {
	Name    string
	A, K, S float64
	P       float64
	Share   float64
}

// Config describes a category to draw.
type Config struct {
	Category    string
	Products    int
	Competitors int // L for every product
	Segments    []SegmentSpec
	// FirstID is the number of the first product id (P-<FirstID>).
	FirstID int
}

// Scenario returns the demo category: 300 products of Larkfield Grocers'
// breakfast cereals in three well-separated segments.
func Scenario() Config {
	return Config{
		Category:    "breakfast-cereal",
		Products:    300,
		Competitors: 10,
		FirstID:     1001,
		Segments: []SegmentSpec{
			// Private-label staples: many close substitutes of similar strength.
			{Name: "staples", A: 2.5, K: 2.5, S: 0.45, P: 0.7, Share: 0.4},
			// Niche lines: one or two weak rivals.
			{Name: "niche", A: 1, K: 1.6, S: 0.06, P: 0.2, Share: 0.35},
			// Branded flagships: one dominant rival, fast decay behind it.
			{Name: "flagship", A: 0.6, K: 0.9, S: 0.25, P: 0.4, Share: 0.25},
		},
	}
}

// Product is one drawn product with its full latent vector.
type Product struct {
	ID      string
	Segment int // index into Config.Segments
	// Latent holds all L latent values, descending; Reported is its
	// top-n prefix, n ~ Binomial(L, P).
	Latent   []float64
	Reported []float64
	// Rivals holds competitor ids aligned with Latent.
	Rivals []string
}

// L returns the number of candidate competitors.
func (p *Product) L() int { return len(p.Latent) }

// Datum returns the product's reported values as a model datum.
func (p *Product) Datum() sequential.Datum {
	return sequential.MustDatum(p.Reported, len(p.Latent))
}

// Generate draws cfg.Products products: segments in proportion to their
// shares (assigned in blocks, so counts are exact up to rounding).
func Generate(cfg Config, src *rand.Rand) []Product {
	out := make([]Product, cfg.Products)
	seg := assignSegments(cfg, src)
	for i := range out {
		out[i] = Product{ID: productID(cfg, i), Segment: seg[i]}
		Redraw(cfg, &out[i], src)
	}
	return out
}

// Redraw replaces p's latent vector and report count with a fresh draw
// from its (possibly changed) segment: what a new refit of the same
// product looks like.
func Redraw(cfg Config, p *Product, src *rand.Rand) {
	spec := cfg.Segments[p.Segment]
	ew := sequential.ExpWeibull{A: spec.A, K: spec.K, S: spec.S}
	l := cfg.Competitors
	p.Latent = make([]float64, l)
	for j := range p.Latent {
		p.Latent[j] = ew.Rand(src)
	}
	sort.Sort(sort.Reverse(sort.Float64Slice(p.Latent)))
	n := 0
	for j := 0; j < l; j++ {
		if src.Float64() < spec.P {
			n++
		}
	}
	p.Reported = p.Latent[:n:n]
	p.Rivals = rivals(cfg, p.ID, l, src)
}

// Perturb re-estimates p's latent vector: each competitor's value is
// multiplied by exp(sd * e) with e standard normal (log-scale estimation
// noise), the vector is sorted again with its competitor ids, and the
// report count stays. The new vector is fresh memory: slices handed out
// before stay as they were.
func Perturb(p *Product, sd float64, src *rand.Rand) {
	l := len(p.Latent)
	idx := make([]int, l)
	vals := make([]float64, l)
	for j := range idx {
		idx[j] = j
		vals[j] = p.Latent[j] * math.Exp(sd*src.NormFloat64())
	}
	sort.SliceStable(idx, func(a, b int) bool { return vals[idx[a]] > vals[idx[b]] })
	latent := make([]float64, l)
	rivals := make([]string, l)
	for j, i := range idx {
		latent[j] = vals[i]
		rivals[j] = p.Rivals[i]
	}
	n := len(p.Reported)
	p.Latent, p.Rivals = latent, rivals
	p.Reported = p.Latent[:n:n]
}

// rivals draws l distinct competitor ids other than self: from the
// category's own products while it has enough, then from a pool of
// outside-category ids (P-9xxxx).
func rivals(cfg Config, self string, l int, src *rand.Rand) []string {
	out := make([]string, 0, l)
	seen := map[string]bool{self: true}
	pool := cfg.Products
	for tries := 0; len(out) < l; tries++ {
		var id string
		if tries < 4*l && pool > 1 {
			id = fmt.Sprintf("P-%d", cfg.FirstID+src.IntN(pool))
		} else {
			id = fmt.Sprintf("P-9%04d", src.IntN(10000))
		}
		if !seen[id] {
			seen[id] = true
			out = append(out, id)
		}
	}
	return out
}

func assignSegments(cfg Config, src *rand.Rand) []int {
	total := 0.0
	for _, s := range cfg.Segments {
		total += s.Share
	}
	seg := make([]int, cfg.Products)
	i := 0
	acc := 0.0
	for c, s := range cfg.Segments {
		acc += s.Share
		end := int(float64(cfg.Products)*acc/total + 0.5)
		if c == len(cfg.Segments)-1 {
			end = cfg.Products
		}
		for ; i < end; i++ {
			seg[i] = c
		}
	}
	src.Shuffle(len(seg), func(a, b int) { seg[a], seg[b] = seg[b], seg[a] })
	return seg
}

func productID(cfg Config, i int) string { return fmt.Sprintf("P-%d", cfg.FirstID+i) }

// Message is the wire form of one product's refit result (relative form).
type Message struct {
	Product     string    `json:"product"`
	Refit       string    `json:"refit"`
	Competitors int       `json:"competitors"`
	Relative    []float64 `json:"relative"`
	IDs         []string  `json:"ids,omitempty"`
}

// MessageJSON returns the input message for p in refit as one JSON line
// (without the newline), values rounded to 6 significant digits as a
// refit report would carry them.
func (p *Product) MessageJSON(refit string) []byte {
	m := Message{Product: p.ID, Refit: refit, Competitors: p.L(), Relative: make([]float64, len(p.Reported))}
	for j, v := range p.Reported {
		m.Relative[j] = round6(v)
	}
	if len(p.Reported) > 0 {
		m.IDs = append([]string(nil), p.Rivals[:len(p.Reported)]...)
	}
	b, err := json.Marshal(m)
	if err != nil {
		panic("synth: marshal: " + err.Error()) // cannot happen for finite values
	}
	return b
}

func round6(v float64) float64 {
	var f float64
	fmt.Sscanf(fmt.Sprintf("%.6g", v), "%g", &f)
	return f
}

// Layout says how far apart the true segments of a drawn category lie.
type Layout int

const (
	// Separated segments differ in scale by a factor of about 2.2 from one
	// to the next, and in shape and report chance as well: most products
	// belong clearly to one segment.
	Separated Layout = iota
	// Overlapping segments differ in scale by a factor of about 1.35 and
	// share similar shapes: many products could belong to either of two
	// neighbours, and the number of segments itself is uncertain.
	Overlapping
)

// String returns "separated" or "overlapping".
func (l Layout) String() string {
	if l == Overlapping {
		return "overlapping"
	}
	return "separated"
}

// RandomConfig draws a fictional category of the given size with 3 to 5
// true segments laid out as asked, for the agreement and benchmark runs
// that need many different categories. Shares are drawn uniformly and
// normalised, with no segment under 10% of the products.
func RandomConfig(products int, layout Layout, src *rand.Rand) Config {
	return LayoutConfig(products, 3+src.IntN(3), layout, src)
}

// LayoutConfig draws a fictional category of the given size with k true
// segments laid out as asked (the rule of RandomConfig with k fixed).
func LayoutConfig(products, k int, layout Layout, src *rand.Rand) Config {
	return layoutConfig(products, k, layout, overlapStep, src)
}

// overlapStep is the scale ratio of neighbouring Overlapping segments.
const overlapStep = 1.35

// OverlapConfig is LayoutConfig for Overlapping segments whose scales
// differ by the factor step from one to the next instead of 1.35 (the
// same draws otherwise): a knob for studies of how detectability grows
// with the distance between segments.
func OverlapConfig(products, k int, step float64, src *rand.Rand) Config {
	return layoutConfig(products, k, Overlapping, step, src)
}

func layoutConfig(products, k int, layout Layout, step float64, src *rand.Rand) Config {
	cfg := Config{Category: fmt.Sprintf("larkfield-%s-%d", layout, k), Products: products, Competitors: 10, FirstID: 1001}
	order := src.Perm(k)
	for c := 0; c < k; c++ {
		spec := SegmentSpec{Name: fmt.Sprintf("segment-%d", c+1), Share: 1 + src.Float64()}
		r := float64(order[c])
		switch layout {
		case Overlapping:
			spec.S = 0.18 * math.Pow(step, r)
			spec.K = 1.2 + 0.8*src.Float64()
			spec.A = 0.8 + 0.7*src.Float64()
			spec.P = 0.3 + 0.2*src.Float64()
		default:
			spec.S = 0.05 * math.Pow(2.2, r)
			spec.K = 1 + 2*src.Float64()
			spec.A = 0.6 + 1.9*src.Float64()
			spec.P = 0.2 + 0.5*src.Float64()
		}
		cfg.Segments = append(cfg.Segments, spec)
	}
	return cfg
}
