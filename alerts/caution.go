package alerts

// Caution is the sentence every output a person reads carries (tables,
// the dashboard, the demo, the events' summary): the segments, moves and
// missed-competitor probabilities are statistical signals, not advice.
const Caution = "These are statistical signals for analysts, not pricing advice: any pricing action follows the organisation's own review process and competition law."
