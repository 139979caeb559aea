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
package stream
