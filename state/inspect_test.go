package state

import (
	"reflect"
	"testing"
)

func TestSummary(t *testing.T) {
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
	sum, err := s.Summary()
	if err != nil {
		t.Fatal(err)
	}
	if sum.FileBytes <= 0 {
		t.Errorf("FileBytes = %d, want > 0", sum.FileBytes)
	}
	sum.FileBytes = 0 // depends on bbolt's page allocation
	want := Summary{Path: path, Schema: 1, Position: *b.Position, HasPosition: true,
		Outbox: 1, OutboxFirst: 2, OutboxLast: 2,
		Categories: []CategorySummary{
			{Category: "cereal", Products: 2, SnapshotBytes: 19, AlertsBytes: len(b.Categories[0].Alerts),
				Meta: *b.Categories[0].Meta, HasMeta: true},
			{Category: "coffee", Products: 2, Withdrawn: 1, SnapshotBytes: 19},
		}}
	if !reflect.DeepEqual(sum, want) {
		t.Errorf("Summary() =\n%+v\nwant\n%+v", sum, want)
	}
}

func TestSummaryEmpty(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	sum, err := s.Summary()
	if err != nil {
		t.Fatal(err)
	}
	if sum.HasPosition || sum.Outbox != 0 || len(sum.Categories) != 0 {
		t.Errorf("Summary() of a new file = %+v", sum)
	}
}
