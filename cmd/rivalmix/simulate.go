package main

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"math/rand/v2"
	"os"

	"rivalmix/sequential/synth"
)

// runSimulate writes refit results of the fictional demo category (see
// package synth) as JSON lines: one message per product per refit, then a
// refit-complete control line.
func runSimulate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("simulate", "--out FILE [flags]",
		"Writes weekly refit results of a fictional category (Larkfield Grocers, breakfast cereals)\ndrawn from the model with known segments.", stderr)
	out := fs.String("out", "", "output file (JSON lines); - for stdout")
	products := fs.Int("products", 300, "products in the category")
	refits := fs.Int("refits", 1, "number of weekly refits to write")
	switchShare := fs.Float64("switch", 0.1, "share of products that move to another segment for good at the middle refit")
	seed := fs.Uint64("seed", 1, "random seed")
	firstWeek := fs.Int("week", 40, "ISO week number of the first refit (refit ids are 2026-Www)")
	if err := fs.Parse(args); err != nil {
		return err
	}
	if *out == "" {
		fs.Usage()
		return fmt.Errorf("simulate: --out is required")
	}
	if *products < 1 || *refits < 1 || *switchShare < 0 || *switchShare > 1 {
		return fmt.Errorf("simulate: --products and --refits must be >= 1 and --switch in [0, 1]")
	}
	var w io.Writer = stdout
	if *out != "-" {
		f, err := os.Create(*out)
		if err != nil {
			return fmt.Errorf("simulate: %w", err)
		}
		defer f.Close()
		w = f
	}
	bw := bufio.NewWriter(w)
	cfg := synth.Scenario()
	cfg.Products = *products
	src := rand.New(rand.NewPCG(*seed, 0x51))
	seq := synth.NewSequence(cfg, *refits, *switchShare, src)
	for r := 0; r < *refits; r++ {
		if err := ctx.Err(); err != nil {
			return err
		}
		refit := fmt.Sprintf("2026-W%02d", *firstWeek+r)
		ps := seq.Refit(r)
		for i := range ps {
			bw.Write(ps[i].MessageJSON(refit))
			bw.WriteByte('\n')
		}
		fmt.Fprintf(bw, `{"refit":%q,"complete":true,"expected":%d}`+"\n", refit, len(ps))
	}
	if err := bw.Flush(); err != nil {
		return fmt.Errorf("simulate: write %s: %w", *out, err)
	}
	if *out != "-" {
		fmt.Fprintf(stderr, "wrote %d refits of %d products to %s\n", *refits, *products, *out)
	}
	return nil
}
