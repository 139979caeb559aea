package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/state"
	"rivalmix/stream/category"
	"rivalmix/stream/input"
)

// fitConfig holds the flags of `rivalmix fit`.
type fitConfig struct {
	in, out, category string
	rejected          string
	report            string
	seed              uint64
	sweeps, burn      int
	thin              int
	threshold         float64
	similarity        bool
	strict            bool
	competitors       int
	quiet             bool
	method            string
	particles         int
	buildChains       int
	buildBurn         int
	splitMerge        float64
}

func runFit(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("fit", "--in FILE.jsonl --out posterior.json [flags]",
		"Fits the segmentation to one category's refit results (JSON lines, one input message per\nline) with the batch sampler, prints a segment table and writes posterior.json.", stderr)
	var c fitConfig
	def := sequential.DefaultGibbsConfig()
	fs.StringVar(&c.in, "in", "", "input file of refit results, one JSON message per line (required)")
	fs.StringVar(&c.out, "out", "", "posterior JSON to write (required)")
	fs.StringVar(&c.category, "category", "", "category name written to the output (default: the input file name without extension)")
	fs.Uint64Var(&c.seed, "seed", 1, "random seed; the same seed and input give the same output")
	fs.IntVar(&c.sweeps, "sweeps", def.Sweeps, "Gibbs sweeps in total")
	fs.IntVar(&c.burn, "burn", def.Burn, "sweeps discarded as burn-in")
	fs.IntVar(&c.thin, "thin", def.Thin, "keep every n-th sweep after burn-in")
	fs.Float64Var(&c.threshold, "threshold", 0.25, "relative cross-elasticity t for the missed-competitor probability P(next value > t)")
	fs.BoolVar(&c.similarity, "similarity", false, "also write the N x N co-segment probability matrix")
	fs.BoolVar(&c.strict, "strict", false, "abort on the first bad line, and reject non-positive entries instead of dropping them")
	fs.IntVar(&c.competitors, "competitors", input.DefaultCompetitors, "candidate competitors L for messages that do not say")
	fs.BoolVar(&c.quiet, "quiet", false, "print nothing but errors: no progress lines, table or totals")
	fs.StringVar(&c.rejected, "rejected", "", "also write rejected lines with their reasons to this file (one JSON object per line)")
	fs.StringVar(&c.report, "report", "", "also write a self-contained HTML report (figures and tables) to this file")
	fs.StringVar(&c.method, "method", "gibbs", "gibbs (batch sampler) or particles (the sequential updater's first population, as a new category gets it)")
	fs.Float64Var(&c.splitMerge, "split-merge", def.SplitMerge, "split-merge proposals per sweep (whole-segment moves; 0 turns them off)")
	pdef := sequential.DefaultParticleConfig()
	fs.IntVar(&c.particles, "particles", pdef.Particles, "with --method particles: the population's size")
	fs.IntVar(&c.buildChains, "build-chains", pdef.BuildChains, "with --method particles: batch chains that make the population")
	fs.IntVar(&c.buildBurn, "build-burn", pdef.BuildBurn, "with --method particles: burn-in sweeps of each chain")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if c.in == "" || c.out == "" {
		return usageErrorf(fs, "--in and --out are required")
	}
	if c.category == "" {
		c.category = strings.TrimSuffix(filepath.Base(c.in), filepath.Ext(c.in))
	}
	gc := def
	gc.Sweeps, gc.Burn, gc.Thin, gc.SplitMerge = c.sweeps, c.burn, c.thin, c.splitMerge
	if err := gc.Validate(); err != nil {
		return fmt.Errorf("fit: %w", err)
	}
	if !(c.threshold > 0) || math.IsInf(c.threshold, 0) {
		return fmt.Errorf("fit: --threshold %v, want finite and > 0", c.threshold)
	}
	if c.method != "gibbs" && c.method != "particles" {
		return usageErrorf(fs, "--method %q, want gibbs or particles", c.method)
	}
	if err := input.ValidateCompetitors("fit: --competitors", c.competitors); err != nil {
		return err
	}
	// The output is written after a fit that may take minutes: find out
	// now whether it can be.
	if err := checkWritable(c.out); err != nil {
		return fmt.Errorf("fit: --out: %w", err)
	}
	if c.report != "" {
		if err := checkWritable(c.report); err != nil {
			return fmt.Errorf("fit: --report: %w", err)
		}
	}
	progress, rej, err := openOutputs(c.quiet, stderr, c.rejected)
	if err != nil {
		return fmt.Errorf("fit: --rejected: %w", err)
	}
	defer rej.file.Close()

	cat, err := readCategory(c.in, c.competitors, c.strict, rej)
	if err != nil {
		return fmt.Errorf("fit: %w", err)
	}
	if len(cat.ids) == 0 {
		return fmt.Errorf("fit: %s holds no product data", c.in)
	}

	var draws []sequential.Draw
	if c.method == "gibbs" {
		draws, err = fitGibbs(ctx, c, gc, cat, progress)
	} else {
		draws, err = fitParticles(ctx, c, cat, progress)
	}
	if err != nil {
		return err
	}

	opt := sequential.DefaultSummaryOptions()
	opt.Threshold = c.threshold
	opt.Prior = gc.Prior
	sum, err := sequential.Summarize(draws, cat.data, opt)
	if err != nil {
		return fmt.Errorf("fit: summarise: %w", err)
	}
	post := newPosteriorFile(c.category, cat.ids, cat.data, draws, sum, c.similarity)
	if err := writeJSON(c.out, post); err != nil {
		return fmt.Errorf("fit: %w", err)
	}
	if c.report != "" {
		if err := writeFitReport(c, cat, draws, sum); err != nil {
			return fmt.Errorf("fit: --report: %w", err)
		}
	}
	if c.quiet {
		return nil
	}
	printSegmentTable(stdout, cat.data, sum)
	fmt.Fprintf(stdout, "\n%d products, %d lines skipped, %d non-positive entries dropped; %d draws (%s); expected Binder loss %.1f; wrote %s\n\n%s\n",
		len(cat.ids), rej.n, cat.dropped, len(draws), c.method, sum.Binder, c.out, alerts.Caution)
	return nil
}

func fitGibbs(ctx context.Context, c fitConfig, gc sequential.GibbsConfig, cat *categoryData, stderr io.Writer) ([]sequential.Draw, error) {
	src := rand.New(rand.NewPCG(c.seed, 0x5eed))
	g, err := sequential.NewGibbs(cat.data, gc, src)
	if err != nil {
		return nil, fmt.Errorf("fit: %w", err)
	}
	start := time.Now()
	last := start
	progress := func(sweep, total, segments int) {
		if ctx.Err() != nil {
			return
		}
		if now := time.Now(); sweep == total || now.Sub(last) >= time.Second {
			last = now
			fmt.Fprintf(stderr, "sampling: sweep %d/%d, %d segments, %.1fs\n", sweep, total, segments, now.Sub(start).Seconds())
		}
	}
	draws := g.Run(src, progress)
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	return draws, nil
}

// fitParticles makes the sequential updater's first population for the
// products, as the service does at a new category's first refit end: the
// states of batch chains, weight 1 each.
func fitParticles(ctx context.Context, c fitConfig, cat *categoryData, stderr io.Writer) ([]sequential.Draw, error) {
	pc := sequential.DefaultParticleConfig()
	pc.Particles, pc.BuildChains, pc.BuildBurn, pc.SplitMerge = c.particles, c.buildChains, c.buildBurn, c.splitMerge
	ps, err := sequential.NewParticles(pc, c.seed, 0x5eed)
	if err != nil {
		return nil, fmt.Errorf("fit: %w", err)
	}
	for i, id := range cat.ids {
		if _, err := ps.Add(id, *cat.data[i]); err != nil {
			return nil, fmt.Errorf("fit: product %s: %w", id, err)
		}
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	start := time.Now()
	if !c.quiet {
		fmt.Fprintf(stderr, "building: %d particles from %d chains of %d burn-in sweeps over %d products\n",
			pc.Particles, min(pc.BuildChains, pc.Particles), pc.BuildBurn, len(cat.ids))
	}
	ps.Build()
	if !c.quiet {
		st := ps.LastStep()
		fmt.Fprintf(stderr, "building: done, %d distinct partitions of %d, %.1fs\n", st.Distinct, ps.NumParticles(), time.Since(start).Seconds())
	}
	return ps.Draws(), nil
}

// categoryData is one category's latest datum per product, in order of
// first appearance.
type categoryData struct {
	ids     []string
	data    []*sequential.Datum
	dropped int
}

// readCategory decodes a JSON-lines file. A later message for the same
// product replaces the earlier one (a newer refit); a withdrawn product is
// removed. Bad lines go to rej, or abort in strict mode.
func readCategory(path string, defaultL int, strict bool, rej *rejectLog) (*categoryData, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	opt := input.DefaultDecodeOptions()
	opt.DefaultCompetitors = defaultL
	opt.Strict = strict
	latest := map[string]input.Message{}
	var order []string
	cat := &categoryData{}
	err = input.DecodeLines(f, opt, func(line int, m input.Message) error {
		switch m.Kind {
		case input.KindDatum:
			if _, ok := latest[m.Product]; !ok {
				order = append(order, m.Product)
			}
			latest[m.Product] = m
		case input.KindWithdrawn:
			delete(latest, m.Product)
		}
		return nil
	}, func(le *input.LineError) error {
		if strict {
			return fmt.Errorf("%s: %w", path, le)
		}
		return rej.add(le.Line, le.Text, le.Err)
	})
	if err != nil {
		return nil, err
	}
	rej.close()
	for _, id := range order {
		m, ok := latest[id]
		if !ok {
			continue
		}
		d, err := sequential.NewDatum(m.Relative, m.Competitors)
		if err != nil {
			return nil, fmt.Errorf("product %s: %w", id, err)
		}
		cat.ids = append(cat.ids, id)
		cat.data = append(cat.data, &d)
		cat.dropped += len(m.Dropped)
	}
	return cat, nil
}

// posteriorFile is the JSON written by fit; its field set is a contract
// with other tools.
type posteriorFile struct {
	Category    string               `json:"category"`
	Products    []string             `json:"products"`
	Segments    map[string]string    `json:"segments"`
	NumSegments map[string]float64   `json:"num_segments"`
	AlphaMean   float64              `json:"alpha_mean"`
	Similarity  [][]float64          `json:"similarity,omitempty"`
	NextValue   map[string]nextValue `json:"next_value"`
}

type nextValue struct {
	Threshold float64 `json:"threshold"`
	PExceed   float64 `json:"p_exceed"`
	Median    float64 `json:"median"`
	Lo        float64 `json:"lo"`
	Hi        float64 `json:"hi"`
}

// segmentLabel names point segment c (0-based) as a category's first
// refit would: S1, S2, ...
func segmentLabel(c int) string { return alerts.SegmentID(c + 1) }

func newPosteriorFile(category string, ids []string, data []*sequential.Datum, draws []sequential.Draw, sum sequential.Summary, similarity bool) posteriorFile {
	p := posteriorFile{
		Category:    category,
		Products:    ids,
		Segments:    make(map[string]string, len(ids)),
		NumSegments: make(map[string]float64, len(sum.NumSegments)),
		AlphaMean:   sum.AlphaMean,
		NextValue:   make(map[string]nextValue),
	}
	for i, id := range ids {
		p.Segments[id] = segmentLabel(sum.Partition[i])
		if nv := sum.Next[i]; nv.Defined {
			p.NextValue[id] = nextValue{Threshold: nv.Threshold, PExceed: nv.PExceed, Median: nv.Median, Lo: nv.Lo, Hi: nv.Hi}
		}
	}
	for k, pr := range sum.NumSegments {
		p.NumSegments[strconv.Itoa(k)] = pr
	}
	if similarity {
		p.Similarity = sequential.SimilarityMatrix(draws)
	}
	return p
}

// checkWritable reports, before any work, an output path that cannot be
// written: a missing directory, a directory in its place, no permission.
// It leaves nothing behind.
func checkWritable(path string) error {
	if fi, err := os.Stat(path); err == nil && fi.IsDir() {
		return fmt.Errorf("%s is a directory", path)
	}
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".check-*")
	if err != nil {
		return fmt.Errorf("cannot write %s: %w", path, err)
	}
	name := f.Name()
	f.Close()
	return os.Remove(name)
}

func writeJSON(path string, v any) error {
	b, err := json.MarshalIndent(v, "", " ")
	if err != nil {
		return err
	}
	tmp := path + ".tmp"
	if err := os.WriteFile(tmp, append(b, '\n'), 0o644); err != nil {
		return err
	}
	return os.Rename(tmp, path)
}

// printSegmentTable prints one row per point segment.
func printSegmentTable(w io.Writer, data []*sequential.Datum, sum sequential.Summary) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "segment\tsize\tmedian 1st\tmedian 2nd\tmedian 3rd\tmean reported\tmissed competitor\t\n")
	for c, s := range sum.Segments {
		missed := 0
		for _, i := range s.Members {
			if nv := sum.Next[i]; nv.Defined && nv.PExceed >= 0.5 {
				missed++
			}
		}
		fmt.Fprintf(tw, "%s\t%d\t%s\t%s\t%s\t%.2f\t%.0f%%\t\n", segmentLabel(c), len(s.Members),
			fmtMedian(s.Median[0]), fmtMedian(s.Median[1]), fmtMedian(s.Median[2]), s.MeanReported,
			100*float64(missed)/float64(len(s.Members)))
	}
	tw.Flush()
	ks := make([]int, 0, len(sum.NumSegments))
	for k := range sum.NumSegments {
		ks = append(ks, k)
	}
	sort.Ints(ks)
	fmt.Fprintf(w, "\nposterior of the number of segments:")
	for _, k := range ks {
		if sum.NumSegments[k] >= 0.005 {
			fmt.Fprintf(w, "  K=%d: %.2f", k, sum.NumSegments[k])
		}
	}
	fmt.Fprintf(w, "\nalpha (posterior mean): %.3f\n", sum.AlphaMean)
}

func fmtMedian(v float64) string {
	if math.IsNaN(v) {
		return "-"
	}
	return strconv.FormatFloat(v, 'f', 3, 64)
}

// writeFitReport writes the fit's HTML report: segments as a category's
// first refit would label them, with its alerts.
func writeFitReport(c fitConfig, cat *categoryData, draws []sequential.Draw, sum sequential.Summary) error {
	acfg := alerts.DefaultConfig()
	acfg.Threshold = c.threshold
	rep, err := category.BatchReport(c.category, "fit", cat.ids, cat.data, draws, sum, acfg)
	if err != nil {
		return err
	}
	index := make(map[string]int, len(cat.ids))
	for i, id := range cat.ids {
		index[id] = i
	}
	records := func(p string) (state.ProductRecord, bool) {
		i, ok := index[p]
		if !ok {
			return state.ProductRecord{}, false
		}
		d := cat.data[i]
		return state.ProductRecord{Product: p, Refit: "fit", Competitors: d.L(), Relative: d.Values()}, true
	}
	v, err := category.NewView(rep, records)
	if err != nil {
		return err
	}
	v.History = nil // one fit: no timeline
	note := fmt.Sprintf("Batch fit (%s) of %s: %d products, %d draws, seed %d.", c.method, filepath.Base(c.in), len(cat.ids), len(draws), c.seed)
	return writeReport(c.report, v, note)
}
