package stream

import (
	"context"
	"fmt"
	"regexp"
	"strconv"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// PartitionStatus is one partition as the cluster sees it.
type PartitionStatus struct {
	Partition int
	// Holder is the worker holding the lease; "" when free.
	Holder string
	// Lag is the partition's input messages not yet acked by its
	// consumer (not yet delivered plus delivered and unacked); -1 when the
	// partition has no consumer yet.
	Lag int64
	// Position is the mirrored input position; 0 when never mirrored.
	Position uint64
	// Categories is the number of categories in the mirrored record.
	Categories int
	// SnapshotAge is how long ago the partition was last mirrored; 0
	// when never.
	SnapshotAge time.Duration
	// Worker is the worker that wrote the last mirror.
	Worker string
}

func nameOf(info *jetstream.ConsumerInfo) string {
	if info == nil {
		return ""
	}
	return info.Name
}

var partitionCount = regexp.MustCompile(`partition\((\d+),`)

// StreamPartitions reads the partition count from the input stream's
// subject transform (1 when it has none).
func StreamPartitions(ctx context.Context, js jetstream.JetStream, inputStream string) (int, error) {
	st, err := js.Stream(ctx, inputStream)
	if err != nil {
		return 0, fmt.Errorf("stream: input stream %s: %w", inputStream, err)
	}
	tr := st.CachedInfo().Config.SubjectTransform
	if tr == nil {
		return 1, nil
	}
	m := partitionCount.FindStringSubmatch(tr.Destination)
	if m == nil {
		return 1, nil
	}
	return strconv.Atoi(m[1])
}

// ClusterStatus reads, for every partition of the input stream, who
// holds it, its consumer's lag and the age of its mirrored state, from
// the claims bucket, the consumers and the object store named in cfg.
func ClusterStatus(ctx context.Context, js jetstream.JetStream, cfg ServiceConfig, now time.Time) ([]PartitionStatus, error) {
	bc := cfg.Bus
	n, err := StreamPartitions(ctx, js, bc.InputStream)
	if err != nil {
		return nil, err
	}
	bc.Partitions = n
	holders, err := ClaimHolders(ctx, js, cfg.Claims.Bucket, n)
	if err != nil {
		return nil, err
	}
	mirror, err := OpenMirrorReadOnly(ctx, js, cfg.MirrorBucket)
	if err != nil {
		return nil, err
	}
	st, err := js.Stream(ctx, bc.InputStream)
	if err != nil {
		return nil, fmt.Errorf("stream: input stream %s: %w", bc.InputStream, err)
	}
	var infos []*jetstream.ConsumerInfo
	list := st.ListConsumers(ctx)
	for info := range list.Info() {
		infos = append(infos, info)
	}
	if err := list.Err(); err != nil {
		return nil, fmt.Errorf("stream: list consumers of %s: %w", bc.InputStream, err)
	}
	out := make([]PartitionStatus, n)
	for p := range n {
		ps := PartitionStatus{Partition: p, Holder: holders[p], Lag: -1}
		// The newest take's consumer (the highest lease revision).
		var newest *jetstream.ConsumerInfo
		for _, info := range infos {
			if rev, ok := bc.partitionConsumerRev(p, info.Name); ok {
				if old, _ := bc.partitionConsumerRev(p, nameOf(newest)); newest == nil || rev > old {
					newest = info
				}
			}
		}
		if newest != nil {
			ps.Lag = int64(newest.NumPending) + int64(newest.NumAckPending)
		}
		pc, ok, err := mirror.Partition(ctx, p)
		if err != nil {
			return nil, err
		}
		if ok {
			ps.Position, ps.Categories, ps.Worker = pc.Position, len(pc.Categories), pc.Worker
			ps.SnapshotAge = now.Sub(pc.UpdatedAt)
		}
		out[p] = ps
	}
	return out, nil
}
