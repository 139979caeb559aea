package state_test

import (
	"crypto/sha256"
	"fmt"
	"os"
	"path/filepath"

	"rivalmix/state"
)

// A worker commits one micro-batch, then a publisher drains the outbox.
func ExampleStore_Commit() {
	dir, err := os.MkdirTemp("", "rivalmix-state-example")
	if err != nil {
		fmt.Println(err)
		return
	}
	defer os.RemoveAll(dir)

	s, err := state.Open(filepath.Join(dir, "worker.db"), state.Options{})
	if err != nil {
		fmt.Println(err)
		return
	}
	defer s.Close()

	err = s.Commit(state.Batch{
		Categories: []state.CategoryUpdate{{
			Category: "cereal",
			Snapshot: []byte("encoded particle system"),
			Products: []state.ProductRecord{{
				Product:     "P-1042",
				Refit:       "2026-W48",
				Hash:        sha256.Sum256([]byte("P-1042 2026-W48")),
				Competitors: 10,
				Relative:    []float64{0.94, 0.52, 0.31},
				AppliedSeq:  17,
			}},
			Meta: &state.CategoryMeta{LastRefit: "2026-W48", Products: 1},
		}},
		Outbox:   []state.OutboxEvent{{ID: "cereal-2026-W48-summary", Subject: "rivalmix.out.cereal.refit_summary"}},
		Position: &state.Position{Stream: "RIVALMIX_IN", StreamSeq: 17},
	})
	if err != nil {
		fmt.Println(err)
		return
	}

	_, refit, ok, err := s.Applied("cereal", "P-1042")
	fmt.Println("applied:", refit, ok, err)

	pending, err := s.Outbox(10)
	if err != nil {
		fmt.Println(err)
		return
	}
	for _, e := range pending {
		fmt.Println("publish", e.Seq, e.Event.ID, "on", e.Event.Subject)
		// ... publish with Nats-Msg-Id = e.Event.ID, wait for the ack, then:
		if err := s.DeleteOutbox(e.Seq); err != nil {
			fmt.Println(err)
			return
		}
	}
	n, _ := s.OutboxLen()
	fmt.Println("pending after publishing:", n)
	// Output:
	// applied: 2026-W48 true <nil>
	// publish 1 cereal-2026-W48-summary on rivalmix.out.cereal.refit_summary
	// pending after publishing: 0
}
