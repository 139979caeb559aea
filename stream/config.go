package stream

import (
	"errors"
	"fmt"
	"time"

	"rivalmix/alerts"
	"rivalmix/stream/category"
	"rivalmix/stream/input"
)

// ServiceConfig holds the settings of the streaming service.
type ServiceConfig struct {
	Bus    BusConfig
	Worker category.WorkerConfig
	Decode input.DecodeOptions
	// FetchSize and FetchWait bound one fetch from the input consumer:
	// up to FetchSize messages or FetchWait, whichever comes first; each
	// fetch is committed in one transaction (a refit-complete ends one
	// early) and then acked.
	FetchSize int
	FetchWait time.Duration
	// QuietPeriod completes a category's refit when it received changes
	// but no refit-complete message for this long (0 = never). Refits
	// completed this way are not replay-deterministic: they depend on
	// timing; explicit refit-complete messages are.
	QuietPeriod time.Duration
	// Events names the producer in the CloudEvents attributes (source and
	// type prefix) of every published event.
	Events alerts.CloudEventConfig
	// PerCategory overrides Worker for the named categories.
	PerCategory map[string]category.WorkerConfig
	// RejectRetry is how long a failed publication to the rejected stream
	// is retried (pauses doubling from 100 ms to 5 s) before the service
	// stops with the error; nothing is lost then either, since the batch
	// was neither committed nor acked and is processed again at restart.
	RejectRetry time.Duration
	// DiskFullRetry is how long a commit that failed because the state
	// file's disk is full (ENOSPC) is retried, every second, before the
	// service stops with the error. Meanwhile nothing is acked and Ready
	// reports the reason; the batch in hand is committed as soon as space
	// returns, so nothing is lost either way.
	DiskFullRetry time.Duration
	// PendingRefresh is how often the consumer's pending count behind
	// Service.ConsumerPending is asked of the server, > 0.
	PendingRefresh time.Duration
	// Claims are the partition leases, used when Bus.Partitioned; Worker
	// names this worker and Partitions and Replicas follow Bus.
	Claims ClaimConfig
	// MirrorBucket is the object store the partitioned service mirrors
	// each changed category to after every commit.
	MirrorBucket string
}

// workerConfig returns the settings of one category.
func (c ServiceConfig) workerConfig(cat string) category.WorkerConfig {
	if w, ok := c.PerCategory[cat]; ok {
		return w
	}
	return c.Worker
}

// DefaultServiceConfig returns fetches of 256 messages or 200 ms, a
// 10-minute quiet period, a pending count refreshed every 5 s and the
// defaults of the bus, events, worker and decoder.
func DefaultServiceConfig() ServiceConfig {
	return ServiceConfig{
		Bus:            DefaultBusConfig(),
		Worker:         category.DefaultWorkerConfig(),
		Decode:         input.DefaultDecodeOptions(),
		FetchSize:      256,
		FetchWait:      200 * time.Millisecond,
		QuietPeriod:    10 * time.Minute,
		Events:         alerts.DefaultCloudEventConfig(),
		RejectRetry:    2 * time.Minute,
		DiskFullRetry:  30 * time.Minute,
		PendingRefresh: 5 * time.Second,
		Claims:         ClaimConfig{Bucket: DefaultClaimBucket, TTL: DefaultClaimTTL},
		MirrorBucket:   DefaultMirrorBucket,
	}
}

// Validate reports the first setting out of range.
func (c ServiceConfig) Validate() error {
	if err := c.Bus.Validate(); err != nil {
		return err
	}
	if err := c.Decode.Validate(); err != nil {
		return err
	}
	if err := c.Events.Validate(); err != nil {
		return fmt.Errorf("stream: %w", err)
	}
	if err := c.Worker.Validate(); err != nil {
		return fmt.Errorf("stream: defaults: %w", err)
	}
	switch {
	case c.FetchSize < 1:
		return fmt.Errorf("stream: ServiceConfig.FetchSize is %d, want >= 1", c.FetchSize)
	case c.FetchWait <= 0:
		return fmt.Errorf("stream: ServiceConfig.FetchWait is %v, want > 0", c.FetchWait)
	case c.QuietPeriod < 0:
		return fmt.Errorf("stream: ServiceConfig.QuietPeriod is %v, want >= 0", c.QuietPeriod)
	case c.DiskFullRetry < 0:
		return fmt.Errorf("stream: ServiceConfig.DiskFullRetry is %v, want >= 0", c.DiskFullRetry)
	case c.RejectRetry < 0:
		return fmt.Errorf("stream: ServiceConfig.RejectRetry is %v, want >= 0", c.RejectRetry)
	case c.PendingRefresh <= 0:
		return errors.New("stream: ServiceConfig.PendingRefresh must be > 0")
	}
	if c.Bus.Partitioned() {
		cc := c.clusterClaims()
		if err := cc.Validate(); err != nil {
			return err
		}
		if !workerName.MatchString(c.MirrorBucket) {
			return fmt.Errorf("stream: ServiceConfig.MirrorBucket is %q, want letters, digits, '-', '_'", c.MirrorBucket)
		}
		if need := c.MinDuplicateWindow(); c.Bus.DuplicateWindow < need {
			return fmt.Errorf("stream: BusConfig.DuplicateWindow is %s, want >= %s with partitions "+
				"(a taken-over partition republishes the events of up to one claim TTL and one ack wait)", c.Bus.DuplicateWindow, need)
		}
	}
	for cat, w := range c.PerCategory {
		if err := w.Validate(); err != nil {
			return fmt.Errorf("stream: category %s: %w", cat, err)
		}
	}
	return nil
}

// clusterClaims is Claims with the partition count and replicas of the bus.
func (c ServiceConfig) clusterClaims() ClaimConfig {
	cc := c.Claims
	cc.Partitions, cc.Replicas = c.Bus.Partitions, c.Bus.Replicas
	return cc
}

// MinDuplicateWindow is the shortest output duplicate window the
// partitioned service accepts: events republished after a takeover were
// first published at most a claim TTL, a fetch and a commit earlier, so
// twice the TTL plus a minute leaves a wide margin.
func (c ServiceConfig) MinDuplicateWindow() time.Duration { return 2*c.Claims.TTL + time.Minute }
