package web

import (
	"time"

	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/store"
)

// Options are what the pages read besides the store. Only DB is required.
type Options struct {
	// DB is the open state file. The pages only read it (bbolt read
	// transactions, which run beside the service's commits). Required:
	// Handler panics without it, a wiring mistake.
	DB *store.DB

	// Rule returns the alert rule of a sensor: class, unit, tolerance,
	// as-left, windows, trend model, limits and the evidence gates. ok
	// false means the sensor has no rule (fitted, never judged). Nil: no
	// sensor has a rule. Called concurrently from request goroutines.
	Rule func(id string) (r alert.Rule, ok bool)

	// Judgements, when not nil, lists the running service's latest
	// judgement of every sensor window (ingest.Service.Judgements): the
	// pages show those for "as of now", so that they say what the service
	// says. Without it, and for earlier times, the pages judge the stored
	// fit records with the alert rules' gates (alert.Judge). Called
	// concurrently from request goroutines.
	Judgements func(fn func(id, window string, j alert.Judgement))

	// Now is the clock: the time of "as of now" and of the page stamp.
	// Nil means time.Now.
	Now func() time.Time

	// Token, when not empty, is the bearer token every page and API
	// request must carry (Authorization: Bearer, or the cookie the login
	// form sets). Empty: no token asked for, for a loopback listener.
	Token string

	// Refresh is how often the fleet page fetches /api/fleet to redraw
	// its table in place. Zero means 15s; negative is treated as zero.
	Refresh time.Duration

	// Location is the time zone dates are shown in. Nil means UTC.
	Location *time.Location

	// Logger receives request failures (as warnings). The zero value
	// logs nothing.
	Logger zerolog.Logger
}

const defaultRefresh = 15 * time.Second

// defaultHorizon is alert.Rule's Horizon when it and the lead-time
// limits are zero, as documented there.
const defaultHorizon = 365 * 24 * time.Hour
