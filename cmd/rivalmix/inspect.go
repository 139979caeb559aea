package main

import (
	"context"
	"fmt"
	"io"
	"strconv"
	"text/tabwriter"
	"time"

	"rivalmix/state"
)

// runInspect prints what a state file holds.
func runInspect(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("inspect", "--state FILE",
		"Prints the categories, products, segments, outbox size and input position held in a state file.\n"+
			"The file is opened read-only; a running service holds its lock, so stop it first.", stderr)
	file := fs.String("state", "rivalmix.db", "bbolt state file")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *file == "" {
		return usageErrorf(fs, "--state is required")
	}
	st, err := state.Open(*file, state.Options{ReadOnly: true})
	if err != nil {
		return err
	}
	defer st.Close()
	sum, err := st.Summary()
	if err != nil {
		return err
	}
	return writeSummary(stdout, sum)
}

// writeSummary prints a state file's summary: schema, size, input
// position, outbox size and one line per category with its product
// count, segment count, last refit and snapshot size.
func writeSummary(w io.Writer, sum state.Summary) error {
	tw := tabwriter.NewWriter(w, 0, 0, 1, ' ', 0)
	fmt.Fprintf(tw, "state file:\t%s\n", sum.Path)
	fmt.Fprintf(tw, "schema:\t%d\n", sum.Schema)
	fmt.Fprintf(tw, "size:\t%d bytes\n", sum.FileBytes)
	if sum.HasPosition {
		stream := sum.Position.Stream
		if stream == "" {
			stream = "-"
		}
		fmt.Fprintf(tw, "input position:\tstream %s, sequence %d, updated %s\n",
			stream, sum.Position.StreamSeq, formatTime(sum.Position.UpdatedAt))
	} else {
		fmt.Fprintf(tw, "input position:\tnone (the input stream will be read from its start)\n")
	}
	if sum.Outbox > 0 {
		fmt.Fprintf(tw, "outbox:\t%d pending (sequences %d..%d)\n", sum.Outbox, sum.OutboxFirst, sum.OutboxLast)
	} else {
		fmt.Fprintf(tw, "outbox:\t0 pending\n")
	}
	fmt.Fprintf(tw, "categories:\t%d\n", len(sum.Categories))
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write summary: %w", err)
	}
	if len(sum.Categories) == 0 {
		return nil
	}
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintf(tw, "\nCATEGORY\tPRODUCTS\tWITHDRAWN\tSEGMENTS\tREFITS\tLAST REFIT\tSNAPSHOT BYTES\tUPDATED\n")
	for _, c := range sum.Categories {
		segments, refits, last, updated := "-", "-", "-", "-"
		if c.HasMeta {
			segments = strconv.Itoa(c.Meta.Segments)
			refits = strconv.Itoa(c.Meta.Refits)
			if c.Meta.LastRefit != "" {
				last = c.Meta.LastRefit
			}
			updated = formatTime(c.Meta.UpdatedAt)
		}
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%s\t%s\t%d\t%s\n",
			c.Category, c.Products, c.Withdrawn, segments, refits, last, c.SnapshotBytes, updated)
	}
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write summary: %w", err)
	}
	return nil
}

func formatTime(t time.Time) string {
	if t.IsZero() {
		return "-"
	}
	return t.UTC().Format(time.RFC3339)
}
