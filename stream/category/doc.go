// Package category is the per-category update path that `rivalmix serve`
// and `rivalmix replay` share: a [Worker] applies decoded input messages
// to one category's particle system, product records and alert memory,
// completes refits into events and a [RefitReport], hands its changed
// state over for commit ([Worker.Flush], [Worker.Meta]), and turns a
// report into the read API's [View].
//
// The package is pure: no I/O, no clocks, no globals; randomness comes
// from the seeded particle system, so the same messages give the same
// events, bit for bit.
package category
