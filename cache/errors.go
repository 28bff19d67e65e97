package cache

import "errors"

// ErrTooLarge is returned by a Store's Put when one entry alone is larger
// than the store's size cap, so storing it would evict everything else and
// then itself. The proxy answers the request and skips caching it.
var ErrTooLarge = errors.New("cache: entry larger than the store's size cap")
