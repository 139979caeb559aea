package stream

import (
	"fmt"
	"hash/fnv"
	"strconv"
	"strings"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/stream/input"
)

// DefaultPartitionPrefix is the subject prefix under which the input
// stream stores partitioned messages: rivalmix.part.<partition>.<category>.
const DefaultPartitionPrefix = "rivalmix.part"

// MaxPartitions bounds BusConfig.Partitions.
const MaxPartitions = 1024

// Partitioned reports whether categories are split over more than one
// partition (Partitions > 1); with one partition the service runs as a
// single worker with one durable consumer, as before partitions existed.
func (c BusConfig) Partitioned() bool { return c.Partitions > 1 }

// CategoryPartition returns the partition the server's partition()
// transform puts a category in: the 32-bit FNV-1a hash of the category
// token modulo Partitions (nats-server's subject mapping;
// TestPartitionTransform checks it against a real server). 0 with one
// partition. The hash spreads categories unevenly over few partitions:
// 12 categories over 6 can land 1, 2, 2, 3, 3, 1.
func (c BusConfig) CategoryPartition(category string) int {
	if !c.Partitioned() {
		return 0
	}
	h := fnv.New32a()
	h.Write([]byte(category))
	return int(h.Sum32() % uint32(c.Partitions))
}

// PartitionTransform returns the input stream's subject transform when
// Partitioned: a message published on rivalmix.in.<category> is stored as
// rivalmix.part.<p>.<category>, where p = partition(N, category) is the
// server's own hash of the category token into N buckets. The mapping is
// the server's, so publishers need not know it and every server of a
// cluster agrees on it. Nil with one partition.
func (c BusConfig) PartitionTransform() *jetstream.SubjectTransformConfig {
	if !c.Partitioned() {
		return nil
	}
	return &jetstream.SubjectTransformConfig{
		Source:      c.InputPrefix() + ".*",
		Destination: fmt.Sprintf("%s.{{partition(%d,1)}}.{{wildcard(1)}}", c.PartitionPrefix, c.Partitions),
	}
}

// PartitionConsumer returns the name prefix of partition p's durable
// consumers ("rivalmix-worker-p3"). Each take of the partition creates a
// consumer of its own, PartitionConsumer(p) + "-r<lease revision>", so a
// worker that lost the lease and has not noticed yet can never fetch
// (and leave unacked) messages the new holder's consumer owes it: those
// would be redelivered to the new holder only after its position had
// passed them.
func (c BusConfig) PartitionConsumer(p int) string { return c.Durable + "-p" + strconv.Itoa(p) }

// partitionConsumerName is the consumer of the take of p under lease
// revision rev.
func (c BusConfig) partitionConsumerName(p int, rev uint64) string {
	return c.PartitionConsumer(p) + "-r" + strconv.FormatUint(rev, 10)
}

// partitionConsumerRev parses a consumer name of partition p and returns
// its lease revision; ok is false for any other name.
func (c BusConfig) partitionConsumerRev(p int, name string) (rev uint64, ok bool) {
	rest, ok := strings.CutPrefix(name, c.PartitionConsumer(p)+"-r")
	if !ok {
		return 0, false
	}
	rev, err := strconv.ParseUint(rest, 10, 64)
	return rev, err == nil
}

// partitionFilters are the stored subjects partition p consumes: its own
// rivalmix.part.<p>.*, and for partition 0 also the input subjects the
// transform leaves alone (the bare prefix and subjects of more than one
// token), which are rejected with their reason there.
func (c BusConfig) partitionFilters(p int) []string {
	f := []string{c.PartitionPrefix + "." + strconv.Itoa(p) + ".*"}
	if p == 0 {
		f = append(f, c.InputPrefix(), c.InputSubjects)
	}
	return f
}

// PartitionConsumerConfig returns the durable pull consumer of the take
// of partition p under lease revision rev, delivering from stream
// sequence start (from the first message when start is 0), with the
// delivery rules of ConsumerConfig. The server removes it after an hour
// without fetches, should its worker die and no other take the partition.
func (c BusConfig) PartitionConsumerConfig(p int, rev, start uint64) jetstream.ConsumerConfig {
	cc := c.ConsumerConfig()
	cc.Durable = c.partitionConsumerName(p, rev)
	cc.InactiveThreshold = time.Hour
	cc.Description = fmt.Sprintf("rivalmix worker, partition %d of %d", p, c.Partitions)
	cc.FilterSubjects = c.partitionFilters(p)
	cc.Replicas = c.Replicas
	if start > 1 {
		cc.DeliverPolicy = jetstream.DeliverByStartSequencePolicy
		cc.OptStartSeq = start
	}
	return cc
}

// CategoryOf returns the category of a stored input subject: either the
// published form rivalmix.in.<category> or the partitioned form
// rivalmix.part.<p>.<category>. Errors are input.CategoryFromSubject's.
func (c BusConfig) CategoryOf(subject string) (string, error) {
	if c.Partitioned() {
		if rest, ok := strings.CutPrefix(subject, c.PartitionPrefix+"."); ok {
			if _, cat, ok := strings.Cut(rest, "."); ok {
				return input.CategoryFromSubject(c.InputPrefix()+"."+cat, c.InputPrefix())
			}
		}
	}
	return input.CategoryFromSubject(subject, c.InputPrefix())
}

// PartitionOf returns the partition of a stored input subject: the
// number after the partition prefix, or 0 for a subject the transform
// left alone (and always 0 with one partition).
func (c BusConfig) PartitionOf(subject string) int {
	if !c.Partitioned() {
		return 0
	}
	rest, ok := strings.CutPrefix(subject, c.PartitionPrefix+".")
	if !ok {
		return 0
	}
	tok, _, _ := strings.Cut(rest, ".")
	p, err := strconv.Atoi(tok)
	if err != nil || p < 0 || p >= c.Partitions {
		return 0
	}
	return p
}
