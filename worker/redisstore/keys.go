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

// Global keys share the hash tag {global}.
func (k keys) models() string    { return k.p + ":{global}:models" }
func (k keys) jobIndex() string  { return k.p + ":{global}:jobs" }
func (k keys) seq() string       { return k.p + ":{global}:seq" }
func (k keys) claimable() string { return k.p + ":{global}:claimable" }
func (k keys) queued() string    { return k.p + ":{global}:queued" }
func (k keys) running() string   { return k.p + ":{global}:running" }
func (k keys) expiring() string  { return k.p + ":{global}:expiring" }

// idem names the key of an idempotency key: its SHA-256, so that any
// client-chosen string gives a short, safe key.
func (k keys) idem(key string) string {
	h := sha256.Sum256([]byte(key))
	return k.p + ":{global}:idem:" + hex.EncodeToString(h[:])
}

// channel names the pub/sub channel of a topic.
func (k keys) channel(topic string) string { return k.p + ":notify:" + topic }
