package alerts_test

import (
	"fmt"
	"time"

	"rivalmix/alerts"
	"rivalmix/sequential"
)

// summary builds by hand what sequential.Summarize would return for four
// products: point segment of each, membership rows, and P(next > 0.25).
func summary(part []int, mem [][]float64, pNext []float64) sequential.Summary {
	k := 0
	for _, c := range part {
		k = max(k, c+1)
	}
	s := sequential.Summary{Partition: part, Membership: mem, Segments: make([]sequential.SegmentSummary, k)}
	for i, c := range part {
		s.Segments[c].Members = append(s.Segments[c].Members, i)
		s.Segments[c].MeanReported = 3
		s.Segments[c].Median = [3]float64{0.6, 0.35, 0.2}
		s.Next = append(s.Next, sequential.NextSummary{Defined: true, Threshold: 0.25,
			PExceed: pNext[i], Median: 0.2, Lo: 0.1, Hi: 0.3})
	}
	return s
}

// Four weekly refits of a Larkfield Grocers category. P-1004 drifts from
// the first segment to the second; with the default Confirm = 2 its move
// is reported once its membership has crossed the 0.6 / 0.4 band at two
// refits in a row. P-1001 probably misses a competitor from the start.
func ExampleEvaluate() {
	products := []string{"P-1001", "P-1002", "P-1003", "P-1004", "P-1005", "P-1006"}
	d := sequential.MustDatum([]float64{0.8, 0.3}, 10)
	data := []*sequential.Datum{&d, &d, &d, &d, &d, &d}
	home, away := []float64{0.9, 0.1}, []float64{0.1, 0.9}
	refits := []struct {
		id     string
		p1004  int       // point segment of P-1004
		member []float64 // its membership row
	}{
		{"2026-W45", 0, home},
		{"2026-W46", 0, home},
		{"2026-W47", 1, []float64{0.3, 0.7}},
		{"2026-W48", 1, []float64{0.2, 0.8}},
	}
	cfg := alerts.DefaultConfig()
	mem := alerts.Memory{}
	for _, r := range refits {
		part := []int{0, 0, 0, r.p1004, 1, 1}
		rows := [][]float64{home, home, home, r.member, away, away}
		out, err := alerts.Evaluate(cfg, mem, alerts.Refit{
			Category: "breakfast-cereal", Refit: r.id, Products: products, Data: data,
			Summary: summary(part, rows, []float64{0.7, 0.1, 0.1, 0.1, 0.1, 0.1}),
			ESS:     100, Particles: 128, Diversity: 30,
		})
		if err != nil {
			fmt.Println(err)
			return
		}
		mem = out.Memory
		fmt.Println(r.id, out.Labels)
		for _, e := range out.Events {
			if e.Kind != alerts.KindSummary {
				fmt.Printf("  %s %s -> %s\n", e.Kind.Type("com.example.rivalmix"), e.Subject, e.NATSSubject(alerts.DefaultSubjectPrefix))
			}
		}
	}
	// Output:
	// 2026-W45 [S1 S1 S1 S1 S2 S2]
	//   com.example.rivalmix.segment.born S1 -> rivalmix.out.breakfast-cereal.born
	//   com.example.rivalmix.segment.born S2 -> rivalmix.out.breakfast-cereal.born
	//   com.example.rivalmix.competitor.missed P-1001 -> rivalmix.out.breakfast-cereal.missed
	// 2026-W46 [S1 S1 S1 S1 S2 S2]
	// 2026-W47 [S1 S1 S1 S1 S2 S2]
	// 2026-W48 [S1 S1 S1 S2 S2 S2]
	//   com.example.rivalmix.segment.moved P-1004 -> rivalmix.out.breakfast-cereal.moved
}

// The CloudEvents form of an event, with the time the caller assigns. The
// id is the first 32 hex digits of SHA-256 over the length-prefixed
// category, refit, kind and subject (checked with Python's hashlib).
func ExampleEvent_CloudEvent() {
	e := alerts.NewEvent("breakfast-cereal", "2026-W48", alerts.KindRetired, "S2",
		alerts.Retired{Category: "breakfast-cereal", Refit: "2026-W48", Segment: "S2", Size: 14, Successor: "S1"})
	b, err := e.CloudEvent(alerts.DefaultCloudEventConfig(), time.Date(2026, 11, 30, 6, 0, 0, 0, time.UTC))
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(string(b))
	// Output:
	// {"specversion":"1.0","id":"b083d0c21729920c845726de9670efa3","source":"urn:rivalmix:breakfast-cereal","type":"com.example.rivalmix.segment.retired","subject":"S2","time":"2026-11-30T06:00:00Z","datacontenttype":"application/json","data":{"category":"breakfast-cereal","refit":"2026-W48","segment":"S2","size":14,"successor":"S1"}}
}

// Pairing previous segments (rows) with new ones (columns) by overlap.
func ExampleAssignMax() {
	overlap := [][]float64{
		{40, 35, 0},
		{5, 30, 31},
		{0, 2, 25},
	}
	cols, err := alerts.AssignMax(overlap)
	fmt.Println(cols, err)
	// Output:
	// [0 1 2] <nil>
}
