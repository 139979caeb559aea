package main

import (
	"encoding/json"
	"fmt"
	"io"
	"os"
)

// rejectLog writes rejected input lines with their reasons, one JSON
// object per line: {"line":12,"reason":"field \"relative[1]\": ...","raw":"..."};
// fit --rejected and replay --rejected share it.
type rejectLog struct {
	w     io.Writer // the --rejected file, or io.Discard
	file  *os.File  // the --rejected file, or nil
	shown io.Writer // where the first few reasons are printed
	n     int
}

// openOutputs returns where a batch command's progress goes (stderr, or
// nowhere with --quiet) and its reject log, which writes the --rejected
// file at path ("" for none) and prints the first reasons with the
// progress. Close the log's file when done (a nil *os.File closes without
// harm).
func openOutputs(quiet bool, stderr io.Writer, path string) (io.Writer, *rejectLog, error) {
	progress := stderr
	if quiet {
		progress = io.Discard
	}
	r, err := openRejectLog(path, progress)
	return progress, r, err
}

// openRejectLog creates the --rejected file at path ("" for none) and
// prints the first reasons to shown.
func openRejectLog(path string, shown io.Writer) (*rejectLog, error) {
	r := &rejectLog{w: io.Discard, shown: shown}
	if path == "" {
		return r, nil
	}
	f, err := os.Create(path)
	if err != nil {
		return nil, err
	}
	r.w, r.file = f, f
	return r, nil
}

// maxShownRejects is how many rejected lines are also printed.
const maxShownRejects = 10

// add records one rejected line.
func (r *rejectLog) add(line int, raw []byte, reason error) error {
	r.n++
	if r.n <= maxShownRejects {
		fmt.Fprintf(r.shown, "rejected line %d: %v\n", line, reason)
	}
	rec, err := json.Marshal(struct {
		Line   int    `json:"line"`
		Reason string `json:"reason"`
		Raw    string `json:"raw"`
	}{Line: line, Reason: reason.Error(), Raw: string(raw)})
	if err != nil {
		return err
	}
	_, err = fmt.Fprintf(r.w, "%s\n", rec)
	return err
}

// close prints how many lines were rejected when more than were shown.
func (r *rejectLog) close() {
	if r.n > maxShownRejects {
		fmt.Fprintf(r.shown, "rejected %d lines in all\n", r.n)
	}
}
