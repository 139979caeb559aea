package stream

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/state"
)

// DefaultMirrorBucket is the default object store of the mirrored state.
const DefaultMirrorBucket = "rivalmix-state"

// CategoryCopy is one category's state as mirrored to the object store
// (object category/<name>): everything category.RestoreWorker needs,
// and the input position it reflects.
type CategoryCopy struct {
	Category string `json:"category"`
	// Position is the input stream sequence up to which every message of
	// the category is applied.
	Position uint64 `json:"position"`
	// Snapshot is the encoded particle system (sequential.Encode).
	Snapshot []byte `json:"snapshot"`
	// Alerts is the alert memory (opaque, package alerts).
	Alerts   []byte                `json:"alerts,omitempty"`
	Products []state.ProductRecord `json:"products,omitempty"`
	Meta     state.CategoryMeta    `json:"meta"`
}

// PartitionCopy is a partition's progress as mirrored to the object store
// (object partition/<p>): the position up to which all its messages are
// applied and mirrored, and its categories.
type PartitionCopy struct {
	Partition  int               `json:"partition"`
	Position   uint64            `json:"position"`
	Categories map[string]uint64 `json:"categories,omitempty"`
	Worker     string            `json:"worker"`
	UpdatedAt  time.Time         `json:"updated_at"`
}

// Mirror is the cluster-wide copy of the workers' state in a JetStream
// object store with the streams' replica count. Safe for concurrent use.
type Mirror struct {
	obs jetstream.ObjectStore
}

// OpenMirror creates (or opens) the object store bucket.
func OpenMirror(ctx context.Context, js jetstream.JetStream, bucket string, replicas int) (*Mirror, error) {
	obs, err := js.CreateOrUpdateObjectStore(ctx, jetstream.ObjectStoreConfig{
		Bucket:      bucket,
		Description: "rivalmix category snapshots and partition positions",
		Storage:     jetstream.FileStorage,
		Replicas:    replicas,
	})
	if err != nil {
		return nil, fmt.Errorf("stream: state object store %s (replicas %d): %w", bucket, replicas, err)
	}
	return &Mirror{obs: obs}, nil
}

// OpenMirrorReadOnly opens an existing bucket without changing it.
func OpenMirrorReadOnly(ctx context.Context, js jetstream.JetStream, bucket string) (*Mirror, error) {
	obs, err := js.ObjectStore(ctx, bucket)
	if err != nil {
		return nil, fmt.Errorf("stream: state object store %s: %w", bucket, err)
	}
	return &Mirror{obs: obs}, nil
}

func categoryObject(c string) string { return "category/" + c }
func partitionObject(p int) string   { return "partition/" + strconv.Itoa(p) }

func (m *Mirror) put(ctx context.Context, name string, v any) error {
	b, err := json.Marshal(v)
	if err != nil {
		return fmt.Errorf("stream: mirror %s: encode: %w", name, err)
	}
	if _, err := m.obs.PutBytes(ctx, name, b); err != nil {
		return fmt.Errorf("stream: mirror %s: put: %w", name, err)
	}
	return nil
}

func (m *Mirror) get(ctx context.Context, name string, v any) (bool, error) {
	b, err := m.obs.GetBytes(ctx, name)
	if errors.Is(err, jetstream.ErrObjectNotFound) {
		return false, nil
	}
	if err != nil {
		return false, fmt.Errorf("stream: mirror %s: get: %w", name, err)
	}
	if err := json.Unmarshal(b, v); err != nil {
		return false, fmt.Errorf("stream: mirror %s: decode: %w", name, err)
	}
	return true, nil
}

// PutCategory stores c, replacing the previous copy; the object store
// swaps the whole object in, so a reader sees the old or the new copy.
func (m *Mirror) PutCategory(ctx context.Context, c CategoryCopy) error {
	return m.put(ctx, categoryObject(c.Category), c)
}

// Category returns the mirrored copy of a category; ok is false when
// there is none.
func (m *Mirror) Category(ctx context.Context, name string) (c CategoryCopy, ok bool, err error) {
	ok, err = m.get(ctx, categoryObject(name), &c)
	return c, ok, err
}

// PutPartition stores a partition's progress.
func (m *Mirror) PutPartition(ctx context.Context, p PartitionCopy) error {
	return m.put(ctx, partitionObject(p.Partition), p)
}

// Partition returns a partition's mirrored progress; ok is false when
// there is none (a partition never committed).
func (m *Mirror) Partition(ctx context.Context, p int) (c PartitionCopy, ok bool, err error) {
	ok, err = m.get(ctx, partitionObject(p), &c)
	return c, ok, err
}

func jsonUnmarshal(b []byte, v any) error { return json.Unmarshal(b, v) }
