package stream

import (
	"context"
	"fmt"
	"strings"
	"testing"
	"time"
)

// TestPartitionTransform checks that the server stores each category's
// input under one partition, the same for every message of the category,
// that the categories spread over the partitions, and that each
// partition's consumer sees exactly its own messages.
func TestPartitionTransform(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	srv := startTestServer(t)
	_, js := connectTest(t, srv.ClientURL())
	bc := DefaultBusConfig()
	bc.Partitions = 4
	if err := CreateStreams(ctx, js, bc); err != nil {
		t.Fatal(err)
	}
	const cats = 16
	for round := range 2 {
		for c := range cats {
			if _, err := js.Publish(ctx, fmt.Sprintf("rivalmix.in.cat-%02d", c), []byte(fmt.Sprint(round))); err != nil {
				t.Fatal(err)
			}
		}
	}
	if _, err := js.Publish(ctx, "rivalmix.in", []byte("bare")); err != nil {
		t.Fatal(err)
	}
	partOf := map[string]int{}
	seen := 0
	for p := range bc.Partitions {
		cons, err := js.CreateConsumer(ctx, bc.InputStream, bc.PartitionConsumerConfig(p, 1, 0))
		if err != nil {
			t.Fatal(err)
		}
		batch, err := cons.FetchNoWait(100)
		if err != nil {
			t.Fatal(err)
		}
		n := 0
		for m := range batch.Messages() {
			n++
			if got := bc.PartitionOf(m.Subject()); got != p {
				t.Errorf("message on %s delivered to partition %d, its subject says %d", m.Subject(), p, got)
			}
			cat, err := bc.CategoryOf(m.Subject())
			if m.Subject() == "rivalmix.in" {
				if p != 0 || err == nil {
					t.Errorf("bare subject: partition %d, category error %v; want partition 0 and an error", p, err)
				}
				continue
			}
			if err != nil {
				t.Fatalf("category of %s: %v", m.Subject(), err)
			}
			if q := bc.CategoryPartition(cat); q != p {
				t.Errorf("category %s stored in partition %d, CategoryPartition says %d", cat, p, q)
			}
			if q, ok := partOf[cat]; ok && q != p {
				t.Errorf("category %s in partitions %d and %d", cat, q, p)
			}
			partOf[cat] = p
		}
		if n == 0 {
			t.Errorf("partition %d got no messages of %d categories", p, cats)
		}
		seen += n
	}
	if want := 2*cats + 1; seen != want {
		t.Errorf("consumers saw %d messages, want %d", seen, want)
	}
	if len(partOf) != cats {
		t.Errorf("%d categories placed, want %d", len(partOf), cats)
	}
	// The partitioning of a stream holding messages is not changed.
	bc2 := bc
	bc2.Partitions = 1
	if err := CreateStreams(ctx, js, bc2); err == nil {
		t.Error("changing 4 partitions to 1 on a stream with messages was accepted")
	}
}

// TestPartitionConfigValidate checks the partition and claim settings are
// refused with the field named.
func TestPartitionConfigValidate(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct {
		name string
		edit func(*ServiceConfig)
		want string // "" for valid
	}{
		{"one partition", func(c *ServiceConfig) {}, ""},
		{"six partitions", func(c *ServiceConfig) { c.Bus.Partitions = 6; c.Claims.Worker = "w1" }, ""},
		{"zero partitions", func(c *ServiceConfig) { c.Bus.Partitions = 0 }, "Partitions"},
		{"too many partitions", func(c *ServiceConfig) { c.Bus.Partitions = MaxPartitions + 1 }, "Partitions"},
		{"no worker name", func(c *ServiceConfig) { c.Bus.Partitions = 6 }, "Worker"},
		{"bad worker name", func(c *ServiceConfig) { c.Bus.Partitions = 6; c.Claims.Worker = "a.b" }, "Worker"},
		{"short ttl", func(c *ServiceConfig) { c.Bus.Partitions = 6; c.Claims.Worker = "w"; c.Claims.TTL = time.Millisecond }, "TTL"},
		{"short duplicate window", func(c *ServiceConfig) {
			c.Bus.Partitions = 6
			c.Claims.Worker = "w"
			c.Bus.DuplicateWindow = time.Minute
		}, "DuplicateWindow"},
		{"overlapping partition prefix", func(c *ServiceConfig) {
			c.Bus.Partitions = 6
			c.Claims.Worker = "w"
			c.Bus.PartitionPrefix = "rivalmix.in.part"
		}, "PartitionPrefix"},
	} {
		cfg := DefaultServiceConfig()
		tc.edit(&cfg)
		err := cfg.Validate()
		switch {
		case tc.want == "" && err != nil:
			t.Errorf("%s: %v", tc.name, err)
		case tc.want != "" && (err == nil || !strings.Contains(err.Error(), tc.want)):
			t.Errorf("%s: error %v, want one naming %s", tc.name, err, tc.want)
		}
	}
}
