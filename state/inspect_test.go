package state

import (
	"regexp"
	"strings"
	"testing"
)

func TestInspect(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	b := sampleBatch()
	b.Categories[1].Products = append(b.Categories[1].Products, ProductRecord{Product: "Q-2", Withdrawn: true})
	if err := s.Commit(b); err != nil {
		t.Fatal(err)
	}
	if err := s.DeleteOutbox(1); err != nil {
		t.Fatal(err)
	}
	var out strings.Builder
	if err := s.Inspect(&out); err != nil {
		t.Fatal(err)
	}
	// The path is a temporary directory and the size depends on bbolt's
	// page allocation; neither is what this test is about.
	got := strings.ReplaceAll(out.String(), path, "STATE")
	got = regexp.MustCompile(`size: +\d+ bytes`).ReplaceAllString(got, "size:           N bytes")
	want := `state file:     STATE
schema:         1
size:           N bytes
input position: stream RIVALMIX_IN, sequence 3, updated 2026-11-30T12:00:00Z
outbox:         1 pending (sequences 2..2)
categories:     2

CATEGORY  PRODUCTS  WITHDRAWN  SEGMENTS  REFITS  LAST REFIT  SNAPSHOT BYTES  UPDATED
cereal    2         0          1         1       2026-W48    19              2026-11-30T12:00:00Z
coffee    2         1          -         -       -           19              -
`
	if got != want {
		t.Errorf("Inspect output:\n%s\nwant:\n%s", got, want)
	}

	sum, err := s.Summary()
	if err != nil {
		t.Fatal(err)
	}
	if sum.FileBytes <= 0 || sum.Outbox != 1 || !sum.HasPosition || len(sum.Categories) != 2 {
		t.Errorf("Summary() = %+v", sum)
	}
}

func TestInspectEmpty(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	var out strings.Builder
	if err := s.Inspect(&out); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"input position: none", "outbox:         0 pending", "categories:     0"} {
		if !strings.Contains(out.String(), want) {
			t.Errorf("Inspect of a new file lacks %q:\n%s", want, out.String())
		}
	}
}
