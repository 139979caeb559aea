package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"text/tabwriter"
	"time"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/stream"
)

// replayConfig holds the flags of `rivalmix replay`.
type replayConfig struct {
	in, out, category, rejected string
	seed                        uint64
	particles, batch            int
	competitors                 int
	strict, quiet               bool
}

func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("replay", "--in refits.jsonl --out events.jsonl [flags]",
		"Runs the service's update path over a file of input messages (refit results with refit-complete\n"+
			"control lines) and writes the events it would publish, one CloudEvents JSON object per line.\n"+
			"Lines are bare input messages (category from --category or the file name) or envelopes\n"+
			"{\"subject\":\"rivalmix.in.<category>\",\"data\":{...}} as captured from the bus.", stderr)
	var c replayConfig
	wd := stream.DefaultWorkerConfig()
	fs.StringVar(&c.in, "in", "", "input file, one JSON message per line (required)")
	fs.StringVar(&c.out, "out", "", "events file to write (required)")
	fs.StringVar(&c.category, "category", "", "only this category (default: every category; bare lines belong to the input file's name)")
	fs.StringVar(&c.rejected, "rejected", "", "also write rejected lines with their reasons to this file")
	fs.Uint64Var(&c.seed, "seed", wd.Seed, "random seed; the same seed and input give a byte-identical events file")
	fs.IntVar(&c.particles, "particles", wd.Particles.Particles, "particles per category")
	fs.IntVar(&c.batch, "batch", wd.BatchSize, "changed products per micro-batch (a settle after each)")
	fs.IntVar(&c.competitors, "competitors", 10, "candidate competitors L for messages that do not say")
	fs.BoolVar(&c.strict, "strict", false, "reject non-positive entries instead of dropping them")
	fs.BoolVar(&c.quiet, "quiet", false, "no progress lines")
	if err := fs.Parse(args); err != nil {
		return err
	}
	if c.in == "" || c.out == "" {
		fs.Usage()
		return errors.New("replay: --in and --out are required")
	}
	if c.batch < 1 {
		return errors.New("replay: --batch must be >= 1")
	}
	wd.Seed = c.seed
	wd.BatchSize = c.batch
	wd.Particles.Particles = c.particles
	if err := wd.Particles.Validate(); err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	in, err := os.Open(c.in)
	if err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	defer in.Close()
	out, err := os.Create(c.out)
	if err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	defer out.Close()
	var rej io.Writer = io.Discard
	if c.rejected != "" {
		f, err := os.Create(c.rejected)
		if err != nil {
			return fmt.Errorf("replay: %w", err)
		}
		defer f.Close()
		rej = f
	}
	r := &replayer{cfg: c, wcfg: wd, workers: map[string]*replayCategory{}, out: bufio.NewWriter(out),
		rejected: rej, stderr: stderr, defaultCat: strings.TrimSuffix(filepath.Base(c.in), filepath.Ext(c.in))}
	r.opt = stream.DefaultDecodeOptions()
	r.opt.DefaultCompetitors = c.competitors
	r.opt.Strict = c.strict
	if err := r.run(ctx, in); err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	if err := r.out.Flush(); err != nil {
		return fmt.Errorf("replay: write %s: %w", c.out, err)
	}
	r.printTable(stdout)
	fmt.Fprintf(stdout, "\n%d messages applied, %d duplicates, %d rejected, %d events written to %s\n",
		r.applied, r.duplicates, r.rejectedN, r.events, c.out)
	return nil
}

// replayCategory is one category's worker and its per-refit table rows.
type replayCategory struct {
	w    *stream.Worker
	prev map[string]int
	rows []replayRow
}

type replayRow struct {
	category, refit           string
	products, segments, moves int
	alerts                    int
	ess                       float64
	particles, diversity      int
	ari                       float64
	hasPrev                   bool
	surprise                  float64
	elapsed                   time.Duration
}

type replayer struct {
	cfg        replayConfig
	wcfg       stream.WorkerConfig
	opt        stream.DecodeOptions
	workers    map[string]*replayCategory
	out        *bufio.Writer
	rejected   io.Writer
	stderr     io.Writer
	defaultCat string

	applied, duplicates, rejectedN, events int
}

// envelope is a captured bus message: subject and payload.
type envelope struct {
	Subject string          `json:"subject"`
	Data    json.RawMessage `json:"data"`
}

// split returns the category and payload of one line.
func (r *replayer) split(line []byte) (string, []byte, error) {
	var env envelope
	dec := json.NewDecoder(bytes.NewReader(line))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&env); err == nil && env.Subject != "" && len(env.Data) > 0 {
		cat, err := stream.CategoryFromSubject(env.Subject, stream.DefaultInputPrefix)
		return cat, env.Data, err
	}
	return r.defaultCat, line, nil
}

func (r *replayer) run(ctx context.Context, in io.Reader) error {
	sc := bufio.NewScanner(in)
	sc.Buffer(make([]byte, 0, 64<<10), 1<<20)
	line := 0
	start := time.Now()
	for sc.Scan() {
		line++
		if err := ctx.Err(); err != nil {
			return err
		}
		raw := bytes.TrimSpace(sc.Bytes())
		if len(raw) == 0 || raw[0] == '#' {
			continue
		}
		cat, payload, err := r.split(raw)
		if err != nil {
			r.reject(line, raw, err)
			continue
		}
		if r.cfg.category != "" && cat != r.cfg.category {
			continue
		}
		m, err := stream.Decode(payload, r.opt)
		if err != nil {
			r.reject(line, raw, err)
			continue
		}
		rc, err := r.worker(cat)
		if err != nil {
			return err
		}
		if m.Kind == stream.KindRefitComplete {
			if err := r.complete(rc, m.Refit, start); err != nil {
				return err
			}
			continue
		}
		outcome, err := rc.w.Apply(m, uint64(line))
		if err != nil {
			r.reject(line, raw, err)
			continue
		}
		switch outcome {
		case stream.AppliedDuplicate:
			r.duplicates++
		case stream.AppliedAdd, stream.AppliedReplace, stream.AppliedRemove:
			r.applied++
		}
	}
	if err := sc.Err(); err != nil {
		return fmt.Errorf("read line %d: %w", line+1, err)
	}
	return nil
}

func (r *replayer) worker(cat string) (*replayCategory, error) {
	if rc, ok := r.workers[cat]; ok {
		return rc, nil
	}
	w, err := stream.NewWorker(cat, r.wcfg)
	if err != nil {
		return nil, err
	}
	rc := &replayCategory{w: w}
	r.workers[cat] = rc
	return rc, nil
}

func (r *replayer) reject(line int, raw []byte, err error) {
	r.rejectedN++
	if r.rejectedN <= 10 {
		fmt.Fprintf(r.stderr, "rejected line %d: %v\n", line, err)
	}
	rec, _ := json.Marshal(struct {
		Line   int    `json:"line"`
		Reason string `json:"reason"`
		Raw    string `json:"raw"`
	}{Line: line, Reason: err.Error(), Raw: string(raw)})
	fmt.Fprintf(r.rejected, "%s\n", rec)
}

// complete ends a refit of one category and writes its events.
func (r *replayer) complete(rc *replayCategory, refit string, start time.Time) error {
	rep, err := rc.w.CompleteRefit(refit)
	if err != nil {
		return err
	}
	source := "/rivalmix/" + rc.w.Category()
	row := replayRow{category: rc.w.Category(), refit: refit, products: len(rep.Products),
		segments: len(rep.Summary.Segments), ess: rep.ESS, particles: rc.w.Particles().NumParticles(),
		diversity: rep.Diversity, surprise: rep.MeanSurprise, elapsed: time.Since(start)}
	for _, ev := range rep.Events {
		b, err := ev.CloudEvent(source, time.Time{})
		if err != nil {
			return err
		}
		r.out.Write(b)
		r.out.WriteByte('\n')
		r.events++
		switch ev.Kind {
		case alerts.KindMoved:
			row.moves++
		case alerts.KindMissed:
			row.alerts++
		}
	}
	cur := map[string]int{}
	for i, id := range rep.Products {
		cur[id] = rep.Summary.Partition[i]
	}
	if rc.prev != nil {
		var a, b []int
		for _, id := range rep.Products {
			if p, ok := rc.prev[id]; ok {
				a = append(a, p)
				b = append(b, cur[id])
			}
		}
		if len(a) > 1 {
			row.ari, row.hasPrev = sequential.AdjustedRand(a, b), true
		}
	}
	rc.prev = cur
	rc.rows = append(rc.rows, row)
	if !r.cfg.quiet {
		fmt.Fprintf(r.stderr, "refit %s %s: %d products, %d segments, %d moves, %d alerts, ESS %.0f/%d, %.1fs\n",
			row.category, refit, row.products, row.segments, row.moves, row.alerts, row.ess, row.particles, row.elapsed.Seconds())
	}
	return nil
}

func (r *replayer) printTable(w io.Writer) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "category\trefit\tproducts\tsegments\tmoves\talerts\tESS\tancestors\tARI to previous\tmean surprise\t\n")
	cats := make([]string, 0, len(r.workers))
	for c := range r.workers {
		cats = append(cats, c)
	}
	slices.Sort(cats)
	for _, c := range cats {
		for _, row := range r.workers[c].rows {
			ari := "-"
			if row.hasPrev {
				ari = fmt.Sprintf("%.3f", row.ari)
			}
			surprise := "-"
			if !math.IsNaN(row.surprise) {
				surprise = fmt.Sprintf("%.2f", row.surprise)
			}
			fmt.Fprintf(tw, "%s\t%s\t%d\t%d\t%d\t%d\t%.0f/%d\t%d\t%s\t%s\t\n", row.category, row.refit, row.products,
				row.segments, row.moves, row.alerts, row.ess, row.particles, row.diversity, ari, surprise)
		}
	}
	tw.Flush()
}
