// Package stream runs rivalmix on NATS JetStream: it consumes refit
// results, keeps every category's segmentation current in the state file
// and publishes what changed. It holds the bus (streams, consumer,
// connection), the service loop, the outbox publisher, the embedded
// server and the metrics; its sub-packages hold the parts that need no
// bus:
//
//	stream/input     wire format: decoding and validation of one message (pure)
//	stream/category  the per-category update path shared with replay (pure)
//	stream/read      the read model, HTTP read API, dashboard, request/reply
//
// Imports point one way: stream uses its sub-packages, never the reverse.
//
// # The flow
//
//	rivalmix.in.<category>  (and the bare rivalmix.in, rejected: no category)
//	  -> fetch up to FetchSize messages from the durable consumer
//	  -> per message: redelivery check, category from the subject,
//	     input.Decode, category.Worker.Apply; a message that breaks the
//	     input contract goes to rivalmix.rejected.<category> with its
//	     reason, and is terminated
//	  -> a refit-complete message ends the part of the fetch committed
//	     together: the worker settles, summarises and evaluates alerts,
//	     and its events go to the outbox
//	  -> one bbolt transaction per part: snapshots, product records,
//	     alert memory, category meta, outbox events, input position
//	  -> ack the part's messages; wake the publisher
//	  -> Publisher: outbox -> rivalmix.out.<category>.<kind>
//	     (Nats-Msg-Id = event id) -> delete from the outbox once acked
//
// # Durability rules
//
//  1. A message is acked only after the state change it caused is
//     committed.
//  2. Every event is written to the outbox in the same transaction as the
//     state change; the publisher deletes it only after the output stream
//     acknowledged it.
//  3. A redelivered message (its stream sequence at or below the committed
//     position, or the same product, refit and content) is acked without
//     being applied again.
//  4. Rejected input is published to the rejected stream with its reason,
//     and that publication acknowledged, before the message is terminated.
//  5. A crash at any instant, followed by a restart, ends in the same state
//     and the same event ids: the committed input position decides where
//     the consumer starts.
//  6. The random generator's state is part of each category's snapshot.
//  7. The embedded server fsyncs every write.
//  8. The state file is checked at start; a damaged one is refused.
//
// # Partitions, claims and takeover (--partitions N > 1)
//
// With one partition (the default) one worker consumes everything, as
// above. With N > 1 the input stream carries a subject transform, so the
// NATS server itself stores rivalmix.in.<category> as
// rivalmix.part.<p>.<category> with p = partition(N, category); every
// server of a cluster computes the same p, and publishers need not know
// it. Each take of a partition creates its own durable consumer
// (rivalmix-worker-p<p>-r<lease revision>, with the streams' replica
// count) and deletes the earlier ones, so a partition is consumed by
// exactly one worker at a time and a worker that lost its lease without
// noticing cannot fetch messages from its successor's consumer.
//
// Who consumes a partition is settled by leases in a JetStream key-value
// bucket (rivalmix-claims, max age = --claim-ttl, default 10 s): a worker
// takes a free partition with Create (refused when the key exists),
// renews it every min(TTL/5, 1 s) with Update on the revision it holds
// (refused once someone else wrote the key) and gives it back with a
// Delete on that revision. We chose leases over a consumer priority
// group with the pinned-client policy because the taking worker must act
// at the moment it takes a partition, before it applies anything:
// restore the partition's categories and re-create the consumer at their
// stored position. A pinned client only learns of its pin from the
// messages it is handed, cannot be told where to start, and leaves the
// dead client's unacked deliveries to wait out their AckWait; a lease
// gives an explicit moment of ownership, fencing by revision, and the
// server's own expiry for a worker that died. Each worker also renews a
// presence key (worker.<id>), counts the live workers and aims for
// ceil(N / live) partitions: it takes free ones below its share and gives
// back the highest-numbered ones above it, so the claims spread when a
// worker joins and close up when one leaves.
//
// Failure timings: a worker stopped gracefully mirrors its state and
// deletes its leases, and the others take its partitions at their next
// plan (within a second). A worker killed (SIGKILL, power loss) stops
// renewing; the server expires its leases at most --claim-ttl after the
// last renewal, and the others take them within one more plan interval
// (<= 1 s), plus the take itself (read the mirror, re-create the
// consumer) and one fetch. A worker commits only while its lease is at
// least a tenth of the TTL from expiring by its own clock, so a paused
// worker does not commit over its successor.
//
// # Which copy of the state is authoritative
//
// After every commit to its local bbolt file (still the fast path and the
// outbox), the partitioned worker publishes the outbox, then puts each
// changed category (snapshot, alert memory, product records, metadata and
// its input position) into a JetStream object store (rivalmix-state, the
// streams' replica count) as category/<name>, and then the partition's
// record (its input position and the position of each of its categories)
// as partition/<p>. Publishing first means a successor that starts from
// the mirrored position never needs an event only the old worker's outbox
// holds.
//
// While a worker holds a partition its local file is authoritative for
// the partition's categories: it is written first and the mirror follows.
// When a worker takes a partition, the copy with the higher input
// position wins: the mirrored copy (written into the local file first),
// or the local one when this worker committed beyond the mirror before
// it lost the partition. Both are states some prefix of the same input
// produced, so either is correct; the newer one saves re-reading. The
// consumer restarts after the partition's mirrored position (earlier if a
// category's copy is older than the record says), and a message at or
// below its category's position is acked as a duplicate. Events of
// re-read messages carry the same deterministic ids, and the output
// stream's duplicate window (at least 2 x TTL + 1 min, checked at start)
// drops them.
//
// Replicas: --replicas 3 creates the streams, the consumers, the claims
// bucket and the object store with three copies. The embedded server
// (no --nats URL) is a single server on one machine: it cannot hold
// three replicas and does not survive the machine; use a NATS cluster
// of at least three servers for anything beyond one machine.
package stream
