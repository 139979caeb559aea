// Package state keeps one rivalmix worker's durable state in a single
// bbolt file: per category the encoded particle system, the product
// records, the alert memory and a little metadata; the outbox of events
// still to publish; and the position reached in the input stream.
//
// # Schema, version 1
//
// Paths are written bucket/key => value. Every element but the last is a
// bbolt bucket (categories are nested buckets under cat, and each
// category's products are a nested bucket under it); the last element is
// a key.
//
//	meta/schema                        => uint32 big-endian schema version (1)
//	cat/<category>/snapshot            => particle-system bytes, as written by
//	                                      sequential.(*Particles).Encode
//	cat/<category>/alerts              => alert memory bytes (opaque JSON owned
//	                                      by package alerts)
//	cat/<category>/meta                => JSON CategoryMeta (last refit, counts,
//	                                      updated at)
//	cat/<category>/products/<product>  => JSON ProductRecord (last datum, refit,
//	                                      content hash, dropped entries)
//	outbox/<seq>                       => JSON OutboxEvent {id, subject,
//	                                      headers, data}; seq is a big-endian
//	                                      uint64 from the bucket's NextSequence,
//	                                      so keys sort in commit order
//	input/position                     => JSON Position {stream, stream_seq,
//	                                      updated_at}
//
// There is no separate applied/<category>/<product> bucket: the key that
// recognises a redelivered message (refit id and 32-byte content hash) is
// part of the ProductRecord, so it is written by the same Put as the datum
// it describes and can never disagree with it. [Store.Applied] reads it.
//
// A category name and a product id are used as bucket and key names
// verbatim (1 to 32768 bytes). The store itself never reads a clock:
// every time stored comes from the caller, so two runs given the same
// input write the same bytes.
//
// # One transaction per micro-batch
//
// [Store.Commit] writes a whole [Batch] (snapshots, product records, alert
// memory, category metadata, outbox events and the input position) in ONE
// bbolt write transaction, which is fsynced before Commit returns. Either
// all of it is on disk or none of it is, so a worker that acks its input
// only after Commit returns never acks a change it could lose, and a
// crash at any instant leaves a state that some prefix of the batches
// produced.
//
// # Opening, checking, migrating
//
// [Open] takes bbolt's exclusive file lock with a timeout (a second
// process gets [ErrLocked] instead of hanging), then runs bbolt's
// consistency check over every page before anything else reads the file.
// A damaged file is refused with [ErrCorrupt]. To rebuild it:
//
//  1. stop the service and move the damaged file aside (keep it for
//     inspection);
//  2. start the service on a new, empty state file
//     (rivalmix serve --state NEW_FILE); with no input position stored it
//     replays the input stream from its first message and rebuilds every
//     category. Replayed events carry the same ids as the first time, so
//     the output stream drops those still inside its duplicate window and
//     consumers can recognise the older ones by id.
//
// A file written by a newer rivalmix ([ErrSchemaTooNew]) is refused
// untouched. A file with an older schema version is brought up to date in
// one write transaction by the migrations registered for each older
// version; if one is missing, or the file is opened read-only, Open fails
// with [ErrSchemaTooOld] and the file is not changed.
package state
