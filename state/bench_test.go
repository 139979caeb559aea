package state

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// BenchmarkCommit measures one micro-batch as a worker writes it: 256
// product records, a 500 KB particle-system snapshot and 10 outbox events
// in one fsynced transaction (NoSync stays false). Between commits the
// outbox is drained, untimed, as the publisher would.
//
//	go test -run XXX -bench Commit -benchtime 200x ./state/
func BenchmarkCommit(b *testing.B) {
	s, _ := openTemp(b)
	rng := rand.New(rand.NewPCG(7, 11))
	snapshot := make([]byte, 500<<10)
	for i := range snapshot {
		snapshot[i] = byte(rng.Uint32())
	}
	products := make([]ProductRecord, 256)
	for i := range products {
		products[i] = record(fmt.Sprintf("P-%04d", i), "2026-W48", 0)
		products[i].Relative = []float64{0.97, 0.81, 0.66, 0.52, 0.43, 0.31, 0.22, 0.15, 0.09, 0.04}
	}
	events := make([]OutboxEvent, 10)
	seq := uint64(0)
	b.SetBytes(int64(len(snapshot)))
	b.ResetTimer()
	for b.Loop() {
		seq++
		snapshot[seq%uint64(len(snapshot))]++ // a new snapshot each time
		for i := range products {
			products[i].AppliedSeq = seq*256 + uint64(i)
		}
		for i := range events {
			events[i] = OutboxEvent{ID: fmt.Sprintf("ev-%d-%d", seq, i), Subject: "rivalmix.out.cereal.segment_moved", Data: []byte(`{"product":"P-0001","from":"S1","to":"S2"}`)}
		}
		err := s.Commit(Batch{
			Categories: []CategoryUpdate{{
				Category: "cereal",
				Snapshot: snapshot,
				Products: products,
				Alerts:   []byte(`{"segments":{"S1":["P-0001"]}}`),
				Meta:     &CategoryMeta{LastRefit: "2026-W48", Products: len(products)},
			}},
			Outbox:   events,
			Position: &Position{Stream: "RIVALMIX_IN", StreamSeq: seq * 256},
		})
		if err != nil {
			b.Fatal(err)
		}

		b.StopTimer()
		pending, err := s.Outbox(0)
		if err != nil {
			b.Fatal(err)
		}
		seqs := make([]uint64, len(pending))
		for i, e := range pending {
			seqs[i] = e.Seq
		}
		if err := s.DeleteOutbox(seqs...); err != nil {
			b.Fatal(err)
		}
		b.StartTimer()
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "commits/s")
	b.ReportMetric(float64(b.N*len(products))/b.Elapsed().Seconds(), "products/s")
}
