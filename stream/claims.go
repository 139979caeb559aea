package stream

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"log/slog"
	"regexp"
	"slices"
	"strconv"
	"sync"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// ClaimConfig configures the partition leases of [Claims].
type ClaimConfig struct {
	// Bucket is the JetStream key-value bucket holding the leases
	// ("rivalmix-claims").
	Bucket string
	// TTL is how long a lease lives without renewal (10 s): the bucket's
	// max age, so the server itself deletes the lease of a worker that
	// stopped renewing. A stopped worker's partitions are taken over
	// within TTL plus one renewal interval plus one fetch.
	TTL time.Duration
	// Worker names this worker in the bucket; letters, digits, '-', '_'
	// and '=' only, unique among the live workers.
	Worker string
	// Partitions is BusConfig.Partitions.
	Partitions int
	// Replicas is the bucket's replica count, the streams' (BusConfig.Replicas).
	Replicas int
}

// DefaultClaimTTL is the default lease lifetime.
const DefaultClaimTTL = 10 * time.Second

// DefaultClaimBucket is the default key-value bucket of the leases.
const DefaultClaimBucket = "rivalmix-claims"

var workerName = regexp.MustCompile(`^[A-Za-z0-9_=-]{1,128}$`)

// Validate reports the first field out of range, naming it.
func (c ClaimConfig) Validate() error {
	switch {
	case c.Bucket == "" || !workerName.MatchString(c.Bucket):
		return fmt.Errorf("stream: ClaimConfig.Bucket is %q, want letters, digits, '-', '_'", c.Bucket)
	case c.TTL < time.Second:
		return fmt.Errorf("stream: ClaimConfig.TTL (--claim-ttl) is %s, want >= 1s", c.TTL)
	case !workerName.MatchString(c.Worker):
		return fmt.Errorf("stream: ClaimConfig.Worker (--worker-id) is %q, want 1..128 letters, digits, '-', '_' or '='", c.Worker)
	case c.Partitions < 1 || c.Partitions > MaxPartitions:
		return fmt.Errorf("stream: ClaimConfig.Partitions is %d, want 1..%d", c.Partitions, MaxPartitions)
	case c.Replicas < 1 || c.Replicas > 5:
		return fmt.Errorf("stream: ClaimConfig.Replicas is %d, want 1..5", c.Replicas)
	}
	return nil
}

// Interval is how often leases are renewed and the claims re-planned:
// a fifth of the TTL, at most one second.
func (c ClaimConfig) Interval() time.Duration { return min(c.TTL/5, time.Second) }

// Key names in the claims bucket.
func partitionKey(p int) string { return "partition." + strconv.Itoa(p) }
func workerKey(w string) string { return "worker." + w }

// ClaimRecord is the value of a partition's lease.
type ClaimRecord struct {
	Partition int    `json:"partition"`
	Worker    string `json:"worker"`
}

// lease is a held partition: the revision to renew from and when the
// request that wrote it was sent (the server's TTL starts later).
type lease struct {
	rev  uint64
	sent time.Time
}

// Claims holds this worker's partition leases in a JetStream key-value
// bucket whose max age is the lease TTL. A lease is taken with Create
// (fails when the key exists), renewed with Update on the revision read
// last (fails when someone else wrote it since) and given up with a
// Delete on that revision; a worker that stops renewing loses it when the
// server expires the key. Each worker also keeps a presence key
// (worker.<id>), so every worker can count the live ones and aim for its
// fair share, ceil(partitions / live workers).
//
// Keep renews in the background; Plan, Valid, Lost and Release are
// called by the service loop. All methods are safe for concurrent use.
type Claims struct {
	cfg ClaimConfig
	kv  jetstream.KeyValue
	lg  *slog.Logger

	mu   sync.Mutex
	held map[int]lease
	lost []int
}

// OpenClaims creates (or updates) the claims bucket and returns a Claims
// holding nothing.
func OpenClaims(ctx context.Context, js jetstream.JetStream, cfg ClaimConfig, lg *slog.Logger) (*Claims, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	kv, err := js.CreateOrUpdateKeyValue(ctx, jetstream.KeyValueConfig{
		Bucket:      cfg.Bucket,
		Description: "rivalmix partition leases",
		History:     1,
		TTL:         cfg.TTL,
		Storage:     jetstream.FileStorage,
		Replicas:    cfg.Replicas,
	})
	if err != nil {
		return nil, fmt.Errorf("stream: claims bucket %s (ttl %s, replicas %d): %w", cfg.Bucket, cfg.TTL, cfg.Replicas, err)
	}
	return &Claims{cfg: cfg, kv: kv, lg: lg, held: map[int]lease{}}, nil
}

// Held returns the partitions this worker holds, sorted.
func (c *Claims) Held() []int {
	c.mu.Lock()
	defer c.mu.Unlock()
	out := make([]int, 0, len(c.held))
	for p := range c.held {
		out = append(out, p)
	}
	slices.Sort(out)
	return out
}

// Revision returns the revision of the lease held on p.
func (c *Claims) Revision(p int) (uint64, bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	l, ok := c.held[p]
	return l.rev, ok
}

// Valid reports whether the lease on p is held and, by this worker's
// clock, at least a tenth of the TTL away from expiring. The service
// checks it before each commit, so a worker that was paused past its
// lease does not commit over its successor.
func (c *Claims) Valid(p int, now time.Time) bool {
	c.mu.Lock()
	defer c.mu.Unlock()
	l, ok := c.held[p]
	return ok && now.Before(l.sent.Add(c.cfg.TTL-c.cfg.TTL/10))
}

// Confirm reports whether this worker still holds p, renewing the lease
// at once when the local clock no longer vouches for it (Valid is
// false): the Update on the held revision succeeds only if nobody wrote
// the key since and the server has not expired it.
func (c *Claims) Confirm(ctx context.Context, p int) bool {
	if c.Valid(p, time.Now()) {
		return true
	}
	c.mu.Lock()
	l, ok := c.held[p]
	c.mu.Unlock()
	if !ok {
		return false
	}
	sent := time.Now()
	rev, err := c.kv.Update(ctx, partitionKey(p), c.value(p), l.rev)
	c.mu.Lock()
	defer c.mu.Unlock()
	if _, still := c.held[p]; !still {
		return false
	}
	if err != nil {
		if errors.Is(err, jetstream.ErrKeyExists) || errors.Is(err, jetstream.ErrKeyNotFound) {
			delete(c.held, p)
			c.lost = append(c.lost, p)
		}
		return false
	}
	c.held[p] = lease{rev: rev, sent: sent}
	return true
}

// Lost returns (and forgets) the partitions whose renewal was refused
// since the last call. A lease the local clock no longer vouches for is
// not among them: Confirm tries it first.
func (c *Claims) Lost() []int {
	c.mu.Lock()
	defer c.mu.Unlock()
	out := c.lost
	c.lost = nil
	slices.Sort(out)
	return out
}

func (c *Claims) value(p int) []byte {
	return fmt.Appendf(nil, `{"partition":%d,"worker":%q}`, p, c.cfg.Worker)
}

// Renew renews the presence key and every held lease once. A lease whose
// revision moved on (another worker holds it) is lost at once; one that
// cannot be reached is kept until it expires by the local clock.
func (c *Claims) Renew(ctx context.Context) {
	if _, err := c.kv.Put(ctx, workerKey(c.cfg.Worker), fmt.Appendf(nil, `{"worker":%q}`, c.cfg.Worker)); err != nil {
		c.lg.Warn("claims: presence not renewed", "err", err)
	}
	for _, p := range c.Held() {
		c.mu.Lock()
		l, ok := c.held[p]
		c.mu.Unlock()
		if !ok {
			continue
		}
		sent := time.Now()
		rev, err := c.kv.Update(ctx, partitionKey(p), c.value(p), l.rev)
		c.mu.Lock()
		if _, still := c.held[p]; still {
			switch {
			case err == nil:
				c.held[p] = lease{rev: rev, sent: sent}
			case errors.Is(err, jetstream.ErrKeyExists) || errors.Is(err, jetstream.ErrKeyNotFound):
				c.lg.Warn("claims: lease lost", "partition", p, "err", err)
				delete(c.held, p)
				c.lost = append(c.lost, p)
			default:
				c.lg.Warn("claims: lease not renewed", "partition", p, "err", err)
			}
		}
		c.mu.Unlock()
	}
}

// Keep renews until ctx ends, every Interval.
func (c *Claims) Keep(ctx context.Context) {
	t := time.NewTicker(c.cfg.Interval())
	defer t.Stop()
	for {
		c.Renew(ctx)
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

// LiveWorkers counts the presence keys in the bucket (at least 1, this
// worker).
func (c *Claims) LiveWorkers(ctx context.Context) (int, error) {
	keys, err := c.kv.ListKeysFiltered(ctx, "worker.*")
	if err != nil {
		return 0, fmt.Errorf("stream: claims: list workers: %w", err)
	}
	n := 0
	self := false
	for k := range keys.Keys() {
		n++
		self = self || k == workerKey(c.cfg.Worker)
	}
	// The lister has stopped by itself once its channel closed; Stop then
	// only reports that its subscription is gone.
	_ = keys.Stop()
	if !self {
		n++
	}
	return n, nil
}

// Plan compares the partitions held with the fair share and returns the
// partitions newly taken (free leases created) and those this worker
// should give up (more than its share; the caller finishes them and calls
// Release). It tries free partitions starting from a place that depends on
// the worker's name, so that workers starting together try different ones
// first.
func (c *Claims) Plan(ctx context.Context) (taken, surplus []int, err error) {
	live, err := c.LiveWorkers(ctx)
	if err != nil {
		return nil, nil, err
	}
	n := c.cfg.Partitions
	share := (n + live - 1) / live
	held := c.Held()
	if len(held) > share {
		return nil, held[share:], nil
	}
	h := fnv.New32a()
	h.Write([]byte(c.cfg.Worker))
	first := int(h.Sum32() % uint32(n))
	for i := 0; i < n && len(held)+len(taken) < share; i++ {
		p := (first + i) % n
		if slices.Contains(held, p) {
			continue
		}
		sent := time.Now()
		rev, err := c.kv.Create(ctx, partitionKey(p), c.value(p))
		if errors.Is(err, jetstream.ErrKeyExists) {
			continue
		}
		if err != nil {
			return taken, nil, fmt.Errorf("stream: claim partition %d: %w", p, err)
		}
		c.mu.Lock()
		c.held[p] = lease{rev: rev, sent: sent}
		c.mu.Unlock()
		taken = append(taken, p)
	}
	return taken, nil, nil
}

// Release gives up the lease on p (a delete on the revision held, so a
// lease already taken by another worker is left alone) and forgets it.
func (c *Claims) Release(ctx context.Context, p int) {
	c.mu.Lock()
	l, ok := c.held[p]
	delete(c.held, p)
	c.mu.Unlock()
	if !ok {
		return
	}
	if err := c.kv.Delete(ctx, partitionKey(p), jetstream.LastRevision(l.rev)); err != nil {
		c.lg.Warn("claims: release", "partition", p, "err", err)
	}
}

// Leave releases every lease and removes the presence key, for a
// graceful stop: the other workers take the partitions over at their next
// plan instead of after the TTL.
func (c *Claims) Leave(ctx context.Context) {
	for _, p := range c.Held() {
		c.Release(ctx, p)
	}
	if err := c.kv.Delete(ctx, workerKey(c.cfg.Worker)); err != nil {
		c.lg.Warn("claims: remove presence", "err", err)
	}
}

// ClaimHolders reads who holds each of n partitions from the bucket
// ("" for a free one), for cluster-status.
func ClaimHolders(ctx context.Context, js jetstream.JetStream, bucket string, n int) ([]string, error) {
	kv, err := js.KeyValue(ctx, bucket)
	if err != nil {
		return nil, fmt.Errorf("stream: claims bucket %s: %w", bucket, err)
	}
	out := make([]string, n)
	for p := range n {
		e, err := kv.Get(ctx, partitionKey(p))
		if errors.Is(err, jetstream.ErrKeyNotFound) {
			continue
		}
		if err != nil {
			return nil, fmt.Errorf("stream: claims: read partition %d: %w", p, err)
		}
		var r ClaimRecord
		if err := jsonUnmarshal(e.Value(), &r); err != nil {
			return nil, fmt.Errorf("stream: claims: partition %d: %w", p, err)
		}
		out[p] = r.Worker
	}
	return out, nil
}
