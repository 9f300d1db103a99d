package jobs

import (
	"errors"
	"fmt"
	"log/slog"
	"time"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/model"
)

// Defaults of Config.
const (
	DefaultMaxUnfinished = 1000
	DefaultRetention     = 24 * time.Hour
	DefaultMaxJobTime    = 10 * time.Minute
	DefaultLeaseTime     = 15 * time.Second
	DefaultLookAhead     = 64
	DefaultPartialEvery  = 500 * time.Millisecond
	// MaxPartialEvery bounds PartialEvery: watchers see a partial result at
	// least this often while a job makes progress.
	MaxPartialEvery = time.Second
	// DefaultPageSize and MaxPageSize bound list pages.
	DefaultPageSize = 50
	MaxPageSize     = 1000
)

// ErrBadConfig is wrapped by *ConfigError.
var ErrBadConfig = errors.New("bad job service configuration")

// ConfigError names the Config field at fault.
type ConfigError struct {
	Field  string
	Reason string
}

func (e *ConfigError) Error() string {
	return fmt.Sprintf("jobs: %v: %s %s", ErrBadConfig, e.Field, e.Reason)
}

// Unwrap lets errors.Is find ErrBadConfig.
func (e *ConfigError) Unwrap() error { return ErrBadConfig }

// Config configures a Service. Zero fields take the documented defaults.
type Config struct {
	// Limits bound the models PutModel accepts (model.DefaultLimits for
	// zero fields).
	Limits model.Limits
	// MaxModelBytes bounds a model document; default model.DefaultMaxDocumentBytes.
	MaxModelBytes int64
	// ExactMaxEntries bounds the junction trees exact inference builds;
	// default exact.DefaultMaxEntries.
	ExactMaxEntries int
	// MaxUnfinished is how many queued and running jobs are allowed; beyond
	// it Submit fails with ErrQueueFull. Default 1000.
	MaxUnfinished int
	// Retention is how long finished jobs are kept; default 24h.
	Retention time.Duration
	// MaxJobTime is a job's deadline, counted from when a worker starts it,
	// when its query gives no stop.timeout; it also caps stop.timeout.
	// Default 10m.
	MaxJobTime time.Duration
	// LeaseTime is the lease on a block or work unit; workers renew it
	// every LeaseTime/3. Default 15s.
	LeaseTime time.Duration
	// LookAhead is how many blocks beyond the merged prefix are handed
	// out; default 64.
	LookAhead int
	// PartialEvery is the least interval between partial-result writes of
	// a running job; default 500ms, at most MaxPartialEvery.
	PartialEvery time.Duration
	// TenantPolicy returns the quotas and scheduling share of a tenant;
	// nil gives every tenant the zero policy (no quotas of its own, share 1).
	TenantPolicy func(tenant string) TenantPolicy
	// Clock is the time source for deadlines and records; default time.Now.
	Clock func() time.Time
	// Logger receives the service's logs; default slog.Default().
	Logger *slog.Logger
}

// withDefaults fills zero fields.
func (c Config) withDefaults() Config {
	if c.MaxModelBytes == 0 {
		c.MaxModelBytes = model.DefaultMaxDocumentBytes
	}
	if c.ExactMaxEntries == 0 {
		c.ExactMaxEntries = exact.DefaultMaxEntries
	}
	if c.MaxUnfinished == 0 {
		c.MaxUnfinished = DefaultMaxUnfinished
	}
	if c.Retention == 0 {
		c.Retention = DefaultRetention
	}
	if c.MaxJobTime == 0 {
		c.MaxJobTime = DefaultMaxJobTime
	}
	if c.LeaseTime == 0 {
		c.LeaseTime = DefaultLeaseTime
	}
	if c.LookAhead == 0 {
		c.LookAhead = DefaultLookAhead
	}
	if c.PartialEvery == 0 {
		c.PartialEvery = DefaultPartialEvery
	}
	if c.Clock == nil {
		c.Clock = time.Now
	}
	if c.Logger == nil {
		c.Logger = slog.Default()
	}
	return c
}

// Validate checks the configuration after defaults, naming the field at
// fault in a *ConfigError.
func (c Config) Validate() error {
	c = c.withDefaults()
	bad := func(field, format string, a ...any) error {
		return &ConfigError{Field: field, Reason: fmt.Sprintf(format, a...)}
	}
	switch {
	case c.Limits.MaxVariables < 0:
		return bad("Limits.MaxVariables", "= %d must not be negative", c.Limits.MaxVariables)
	case c.Limits.MaxStates < 0:
		return bad("Limits.MaxStates", "= %d must not be negative", c.Limits.MaxStates)
	case c.Limits.MaxParents < 0:
		return bad("Limits.MaxParents", "= %d must not be negative", c.Limits.MaxParents)
	case c.Limits.MaxTableEntries < 0:
		return bad("Limits.MaxTableEntries", "= %d must not be negative", c.Limits.MaxTableEntries)
	case c.MaxModelBytes < 0:
		return bad("MaxModelBytes", "= %d must be positive", c.MaxModelBytes)
	case c.ExactMaxEntries < 0:
		return bad("ExactMaxEntries", "= %d must be positive", c.ExactMaxEntries)
	case c.MaxUnfinished < 0:
		return bad("MaxUnfinished", "= %d must be positive", c.MaxUnfinished)
	case c.Retention < 0:
		return bad("Retention", "= %s must be positive", c.Retention)
	case c.MaxJobTime < 0:
		return bad("MaxJobTime", "= %s must be positive", c.MaxJobTime)
	case c.LeaseTime < 10*time.Millisecond:
		return bad("LeaseTime", "= %s must be at least 10ms", c.LeaseTime)
	case c.LookAhead < 0:
		return bad("LookAhead", "= %d must be positive", c.LookAhead)
	case c.PartialEvery < 0 || c.PartialEvery > MaxPartialEvery:
		return bad("PartialEvery", "= %s must be between 0 and %s", c.PartialEvery, MaxPartialEvery)
	}
	return nil
}
