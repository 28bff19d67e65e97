package upstreamtest

// vocabulary returns the toy model's tokens: invented words about a
// cooperative of beekeepers who move their hives along a river on barges,
// each with a leading space like the word tokens of a byte-pair tokenizer,
// then the punctuation tokens, which have none. Sentence ends come first
// among the punctuation; sentenceEnds says how many there are.
func vocabulary() []string {
	words := []string{
		// the cooperative and its people
		"cooperative", "keeper", "keepers", "skipper", "deckhand", "apprentice", "elder", "members",
		"council", "ledger", "treasurer", "warden", "pilot", "cook", "mender", "neighbour",
		"stranger", "guest", "family", "crew", "founder", "steward", "scribe", "weaver",
		// barges and the river
		"barge", "barges", "hull", "deck", "mast", "rudder", "tiller", "mooring",
		"rope", "anchor", "lock", "locks", "weir", "towpath", "bank", "banks",
		"river", "current", "ferry", "landing", "quay", "jetty", "channel", "bend",
		"shallows", "eddy", "tide", "floodgate", "sluice", "bridge", "pier", "wake",
		// bees and hives
		"hive", "hives", "bee", "bees", "queen", "drone", "drones", "worker",
		"workers", "swarm", "comb", "combs", "frame", "frames", "brood", "cell",
		"wax", "honey", "nectar", "pollen", "propolis", "smoker", "veil", "sting",
		"colony", "colonies", "apiary", "skep", "super", "entrance", "flight", "dance",
		// plants and places along the river
		"clover", "heather", "lime", "willow", "alder", "meadow", "meadows", "orchard",
		"thyme", "borage", "bramble", "reed", "reeds", "marsh", "field", "fields",
		"hedge", "blossom", "blossoms", "linden", "village", "mill", "market", "harbour",
		// weather and time
		"morning", "evening", "dawn", "dusk", "spring", "summer", "autumn", "winter",
		"rain", "fog", "wind", "frost", "sun", "cloud", "storm", "season",
		"week", "day", "night", "hour", "harvest", "journey", "voyage", "crossing",
		// things and goods
		"jar", "jars", "crate", "crates", "barrel", "lantern", "candle", "candles",
		"mead", "bread", "tea", "basket", "map", "chart", "bell", "whistle",
		"coin", "share", "shares", "price", "order", "cargo", "sack", "tarpaulin",
		// verbs
		"carries", "moves", "drifts", "moors", "rows", "poles", "steers", "waits",
		"gathers", "tends", "smokes", "lifts", "opens", "closes", "counts", "weighs",
		"sells", "trades", "writes", "records", "sings", "hums", "buzzes", "forages",
		"returns", "leaves", "follows", "crosses", "reaches", "divides", "keeps", "mends",
		"is", "are", "was", "were", "has", "have", "will", "can",
		// adjectives
		"golden", "amber", "quiet", "slow", "busy", "gentle", "heavy", "light",
		"early", "late", "warm", "cold", "calm", "wild", "sweet", "dark",
		"pale", "full", "empty", "small", "large", "old", "new", "careful",
		// small words
		"the", "a", "an", "of", "to", "and", "on", "in",
		"at", "by", "with", "from", "for", "under", "over", "past",
		"along", "before", "after", "while", "when", "every", "each", "no",
		"their", "our", "her", "his", "its", "this", "that", "one",
		"two", "three", "four", "first", "last", "more", "less", "near",
	}
	vocab := make([]string, 0, len(words)+6)
	for _, w := range words {
		vocab = append(vocab, " "+w)
	}
	return append(vocab, ".", "!", "?", ",", ";", ":")
}

// sentenceEnds is how many punctuation tokens (the first ones) end a
// sentence; only after one of them can a completion end on its own
// (finish_reason "stop").
const sentenceEnds = 3

// punctuationTokens is how many punctuation tokens end the vocabulary.
const punctuationTokens = 6
