package budget

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"time"
)

// Ledger keeps spend per team, per key and across all teams, and enforces
// caps on it by reservation.
//
// The protocol: before an upstream call, Reserve the worst-case cost. The
// reservation holds that amount against every capped scope until it is
// settled; if it does not fit under a cap, Reserve fails with an
// *ExhaustedError and holds nothing. After the call, Settle the actual cost:
// it is charged and the rest of the hold is released. A reservation carries a
// lease: if its holder dies, Expire (run periodically by any replica) charges
// it in full at the reserved amount, because the upstream may have billed the
// call; the money is never silently refunded. Settling after the lease
// deadline charges at least the reserved amount for the same reason.
//
// Spend is summed per calendar period ([Period.Bucket]) in the ledger's
// time zone; a reservation is charged to the periods current when it was
// made, even if it is settled after they end.
//
// Every method takes the current time as a parameter. Implementations are
// safe for concurrent use, also by several processes sharing one store, and
// each operation is atomic: concurrent reservations never overspend a cap.
// A cap holds exactly as long as actual costs never exceed their
// reservations; an overrun (actual above reserved) is still charged, since
// the money was spent, and may take a scope past its limit.
type Ledger interface {
	// Reserve holds req.Amount against req's caps until settled or expired.
	Reserve(ctx context.Context, now time.Time, req Request) (Reservation, error)
	// Settle charges actual for res and releases the rest of its hold. It
	// returns ErrNotHeld if res was already settled or expired.
	Settle(ctx context.Context, now time.Time, res Reservation, actual Nanos) (Settlement, error)
	// Expire charges every reservation whose lease deadline is not after
	// now at its reserved amount, and returns them. Each expired
	// reservation is returned by exactly one call, even when several
	// processes sweep at once, so the caller can journal it.
	Expire(ctx context.Context, now time.Time) ([]Reservation, error)
	// Balance returns the spend and holds of scope in the period of p that
	// contains now.
	Balance(ctx context.Context, now time.Time, scope Scope, p Period) (Balance, error)
}

// ErrExhausted is the sentinel for a reservation that does not fit under a
// cap; the error is an *ExhaustedError. The proxy answers it with 402.
var ErrExhausted = errors.New("budget: exhausted")

// ErrNotHeld is returned by Settle for a reservation the ledger no longer
// holds: it was settled already, or its lease expired and Expire charged it
// in full.
var ErrNotHeld = errors.New("budget: reservation is not held (already settled, or its lease expired and it was charged in full)")

// ErrInvalid reports a malformed request to a ledger: bad names, amounts,
// caps or leases. The error text says which.
var ErrInvalid = errors.New("budget: invalid request")

// InDoubtError is Reserve's error when the ledger's store stopped answering
// while the reservation was on its way (a connection cut, a timeout, a
// write the store took but could not confirm as durable): the amount may
// be held. Nothing was admitted, so the caller should release Reservation
// (Settle it at 0, which is a no-op if it was never held) once the store
// answers; a reservation nobody releases is charged in full when its lease
// expires, like any other.
type InDoubtError struct {
	Reservation Reservation // what may be held
	Err         error       // the store's error
}

// Error says the reservation is in doubt and why.
func (e *InDoubtError) Error() string {
	return "budget: reservation in doubt (release it when the store answers): " + e.Err.Error()
}

// Unwrap returns the store's error.
func (e *InDoubtError) Unwrap() error { return e.Err }

// Holds describes a team's reservations that are not settled yet.
type Holds struct {
	Count int // reservations held
	// Until is the latest lease deadline among them: by then each is
	// settled by its call or charged in full by Expire. Zero when Count
	// is 0.
	Until time.Time
}

// HoldReporter reports a team's unsettled reservations, for budget
// standings; the embedded and Redis ledgers implement it.
type HoldReporter interface {
	TeamHolds(ctx context.Context, team string) (Holds, error)
}

// ExhaustedError says which cap refused a reservation and how much of it
// was left.
type ExhaustedError struct {
	Scope     Scope  // the scope whose cap refused
	Period    Period // that cap's period
	Limit     Nanos  // that cap's limit
	Remaining Nanos  // limit minus spend and holds, never below zero
	Requested Nanos  // the amount asked for
}

// Error describes the refusal with the amounts in USD.
func (e *ExhaustedError) Error() string {
	return fmt.Sprintf("budget: %s budget exhausted: %s USD left this %s of %s USD, %s USD needed",
		e.Scope, e.Remaining, e.Period, e.Limit, e.Requested)
}

// Unwrap returns ErrExhausted.
func (e *ExhaustedError) Unwrap() error { return ErrExhausted }

// Scope names whose money a sum is: a team (Team set, Key empty), one key of
// a team (both set), or all teams together (the zero Scope).
type Scope struct {
	Team string // the team; empty for the global scope
	Key  string // a key id of Team; empty for the whole team
}

// String formats s as "team lab", "key k1 of team lab" or "global".
func (s Scope) String() string {
	switch {
	case s.Team == "":
		return "global"
	case s.Key == "":
		return "team " + s.Team
	}
	return "key " + s.Key + " of team " + s.Team
}

// Field returns the name ledgers store s's sums under for the period of p
// containing t in loc, for example "t:lab|day:2026-12-01",
// "k:lab:sha256:ab…|month:2026-12" or "g|total". Backends use it so that both
// lay out data alike. Team names hold no ':' and key ids no '|', so fields
// of different scopes never collide.
func (s Scope) Field(p Period, t time.Time, loc *time.Location) string {
	var b strings.Builder
	switch {
	case s.Team == "":
		b.WriteString("g")
	case s.Key == "":
		b.WriteString("t:")
		b.WriteString(s.Team)
	default:
		b.WriteString("k:")
		b.WriteString(s.Team)
		b.WriteString(":")
		b.WriteString(s.Key)
	}
	b.WriteString("|")
	b.WriteString(p.Bucket(t, loc))
	return b.String()
}

// Cap is a spending limit for one scope over a period.
type Cap struct {
	// Limit is the most the scope may spend (settled plus held) per period.
	// Zero allows nothing.
	Limit Nanos
	// Period is how often the limit starts over.
	Period Period
}

// Caps are the limits one reservation must fit under. A nil cap is not
// checked.
type Caps struct {
	Team   *Cap // the team's budget
	Key    *Cap // the calling key's own budget, within the team
	Global *Cap // all teams together
}

// Request asks a ledger to hold money for one upstream call.
type Request struct {
	// Team is the team the call is charged to; see ValidateName.
	Team string
	// Key identifies the calling key within the team (for example its
	// "sha256:…" id). Empty means the call has no key scope; Caps.Key must
	// then be nil.
	Key string
	// Amount is the worst-case cost of the call, an estimate made with
	// Rate.Cost before the call.
	Amount Nanos
	// Caps are the limits to check.
	Caps Caps
	// Lease is how long the hold lasts unsettled before Expire charges it
	// in full. Make it longer than the longest upstream call, streaming
	// included; it must be positive.
	Lease time.Duration
}

// Reservation is money held for one call. It is a plain value: the ledger
// keeps its own record, keyed by ID, so a Reservation may be copied.
type Reservation struct {
	ID       string    // unique, chosen by the ledger
	Team     string    // as requested
	Key      string    // as requested
	Amount   Nanos     // the amount held
	Caps     Caps      // the caps it was checked against
	Created  time.Time // the now given to Reserve; selects the periods charged
	Deadline time.Time // the lease deadline, truncated to the millisecond
	// Remaining is the least budget left, after this hold, across the
	// capped scopes (for a Stint-Budget-Left-Usd header), or -1 if no cap
	// was given.
	Remaining Nanos
}

// Settlement is the outcome of settling a reservation.
type Settlement struct {
	// Charged is what was charged: the actual cost, or the reserved amount
	// if that is larger and the lease had expired. Journal this amount.
	Charged Nanos
	// Released is the part of the hold returned to the budget.
	Released Nanos
	// Expired reports that the lease deadline had passed, so at least the
	// reserved amount was charged.
	Expired bool
	// Remaining is the least budget left across the capped scopes after
	// settling, or -1 if the reservation had no cap.
	Remaining Nanos
}

// Balance is a scope's money in one period.
type Balance struct {
	Spent Nanos // settled charges
	Held  Nanos // reservations not yet settled
}

// maxNameLen bounds team names and key ids.
const maxNameLen = 128

// ValidateName checks a team name: 1 to 128 characters from A-Z, a-z, 0-9,
// '.', '_' and '-'. Names are embedded in store keys (Redis hash tags among
// them), which is why the set is narrow.
func ValidateName(team string) error {
	if team == "" || len(team) > maxNameLen {
		return fmt.Errorf("%w: team name %q must be 1 to %d characters", ErrInvalid, team, maxNameLen)
	}
	for _, c := range team {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '.' || c == '_' || c == '-') {
			return fmt.Errorf("%w: team name %q may hold only letters, digits, '.', '_' and '-'", ErrInvalid, team)
		}
	}
	return nil
}

// validateKey checks a key id: printable ASCII other than '|', '{' and '}'.
func validateKey(key string) error {
	if len(key) > maxNameLen {
		return fmt.Errorf("%w: key id longer than %d characters", ErrInvalid, maxNameLen)
	}
	for _, c := range key {
		if c <= ' ' || c > '~' || c == '|' || c == '{' || c == '}' {
			return fmt.Errorf("%w: key id %q may hold only printable ASCII other than '|', '{', '}'", ErrInvalid, key)
		}
	}
	return nil
}

// Validate checks a cap's limit and period.
func (c Cap) Validate() error {
	if err := c.Limit.check("limit"); err != nil {
		return fmt.Errorf("%w: %w", ErrInvalid, err)
	}
	if err := c.Period.Validate(); err != nil {
		return fmt.Errorf("%w: %w", ErrInvalid, err)
	}
	return nil
}

// Validate checks every field of r; ledgers call it first.
func (r Request) Validate() error {
	if err := ValidateName(r.Team); err != nil {
		return err
	}
	if err := validateKey(r.Key); err != nil {
		return err
	}
	if err := r.Amount.check("amount"); err != nil {
		return fmt.Errorf("%w: %w", ErrInvalid, err)
	}
	if r.Lease <= 0 {
		return fmt.Errorf("%w: lease %v must be positive", ErrInvalid, r.Lease)
	}
	if r.Key == "" && r.Caps.Key != nil {
		return fmt.Errorf("%w: a key cap needs a key id", ErrInvalid)
	}
	for _, c := range []*Cap{r.Caps.Team, r.Caps.Key, r.Caps.Global} {
		if c != nil {
			if err := c.Validate(); err != nil {
				return err
			}
		}
	}
	return nil
}

// Periods are every budget period, in the order ledgers keep their sums.
var Periods = []Period{Day, Week, Month, Total}

// NoLimit is the Limit of a Hold no cap is checked on.
const NoLimit Nanos = -1

// Hold is one sum a reservation holds money against and is charged to: a
// scope's spend in one period, with the limit of the cap checked on it, if
// any.
type Hold struct {
	Scope  Scope
	Period Period
	// Field is Scope.Field for Period at the reservation time.
	Field string
	// Limit is the cap's limit, or NoLimit when no cap is on this sum.
	Limit Nanos
}

// Capped reports whether a cap is checked on h.
func (h Hold) Capped() bool { return h.Limit >= 0 }

// Holds lists the sums a reservation made at now (in loc) for team and key
// holds and is charged to: every period of the key scope (when key is
// set), then every period of the team scope, and separately every period
// of the global scope. The sums of c's caps carry their limits; the others
// are counted only. Counting every charge in every period is what lets a
// budget that changes (a new period, a cap where there was none) find what
// was already spent in the period it covers. Backends use it so both lay
// out data alike.
func (c Caps) Holds(team, key string, now time.Time, loc *time.Location) (local, global []Hold) {
	scoped := func(s Scope, capOf *Cap) []Hold {
		out := make([]Hold, 0, len(Periods))
		for _, p := range Periods {
			h := Hold{Scope: s, Period: p, Field: s.Field(p, now, loc), Limit: NoLimit}
			if capOf != nil && capOf.Period == p {
				h.Limit = capOf.Limit
			}
			out = append(out, h)
		}
		return out
	}
	if key != "" {
		local = scoped(Scope{Team: team, Key: key}, c.Key)
	}
	local = append(local, scoped(Scope{Team: team}, c.Team)...)
	return local, scoped(Scope{}, c.Global)
}

// Exhausted is the refusal of h's cap for a reservation of requested with
// left of the cap remaining.
func (h Hold) Exhausted(left, requested Nanos) *ExhaustedError {
	return &ExhaustedError{Scope: h.Scope, Period: h.Period, Limit: h.Limit, Remaining: max(left, 0), Requested: requested}
}

// CheckActual validates an actual cost passed to Settle.
func CheckActual(actual Nanos) error {
	if err := actual.check("actual cost"); err != nil {
		return fmt.Errorf("%w: %w", ErrInvalid, err)
	}
	return nil
}

// ValidateScope checks the names in a Balance query.
func ValidateScope(s Scope) error {
	if s.Team == "" {
		if s.Key != "" {
			return fmt.Errorf("%w: a key scope needs a team", ErrInvalid)
		}
		return nil
	}
	if err := ValidateName(s.Team); err != nil {
		return err
	}
	return validateKey(s.Key)
}
