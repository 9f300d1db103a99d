package redisstore

import (
	"crypto/sha256"
	"encoding/hex"
)

// keys builds key and channel names (doc.go lists them all).
type keys struct{ p string }

// jobKeys are the keys of one job; they share the hash tag {job:ID}.
type jobKeys struct {
	rec, next, leases, holders, stats string
}

func (k keys) job(id string) jobKeys {
	b := k.p + ":{job:" + id + "}"
	return jobKeys{
		rec:     b,
		next:    b + ":next",
		leases:  b + ":leases",
		holders: b + ":holders",
		stats:   b + ":stats",
	}
}

// modelKeys are the keys of one model; they share the hash tag {model:NAME}.
type modelKeys struct {
	head, info, doc string
}

func (k keys) model(name string) modelKeys {
	b := k.p + ":{model:" + name + "}"
	return modelKeys{head: b, info: b + ":info", doc: b + ":doc"}
}

// The indexes share the hash tag {global}. Scripts on that slot get its
// prefix, global(), and name the keys themselves (see scripts.go), so the
// names below must match the Lua prelude luaGlobal.
func (k keys) global() string    { return k.p + ":{global}" }
func (k keys) models() string    { return k.global() + ":models" }
func (k keys) modelPuts() string { return k.global() + ":modelputs" }
func (k keys) jobIndex() string  { return k.global() + ":jobs" }
func (k keys) meta() string      { return k.global() + ":meta" }
func (k keys) creating() string  { return k.global() + ":creating" }
func (k keys) queued() string    { return k.global() + ":queued" }
func (k keys) running() string   { return k.global() + ":running" }
func (k keys) expiring() string  { return k.global() + ":expiring" }
func (k keys) active() string    { return k.global() + ":active" }
func (k keys) seq() string       { return k.global() + ":seq" }
func (k keys) sweepLock() string { return k.global() + ":sweep" }

// tenant names a per-tenant index: kind is jobs, queued, running,
// claimable or idem:SHA256.
func (k keys) tenant(tenant, kind string) string {
	return k.global() + ":t:" + tenant + ":" + kind
}

// idemSum is the SHA-256 of an idempotency key in hex: any client-chosen
// string gives a short, safe key name.
func idemSum(key string) string {
	h := sha256.Sum256([]byte(key))
	return hex.EncodeToString(h[:])
}

// idem names the key that holds the job ID of a tenant's idempotency key.
func (k keys) idem(tenant, key string) string { return k.tenant(tenant, "idem:"+idemSum(key)) }

// channel names the pub/sub channel of a topic.
func (k keys) channel(topic string) string { return k.p + ":notify:" + topic }
