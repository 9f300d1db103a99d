// Package convert converts between the JSON documents of beliefd (the model
// document of service/model, the query and result documents of
// service/infer, job records of service/jobs) and their typed protobuf
// messages in proto/belief/v1, without loss.
//
// Round trips document -> message -> document give back an equal document,
// with these conventions where protobuf cannot tell "empty" from "absent":
//
//   - a list or map that the JSON document omits when empty (omitempty)
//     comes back nil when empty; one the document always writes comes back
//     empty but not nil, so it is written as [] or {} rather than null;
//   - a distribution given as an empty table or an empty list of keyed rows
//     stays present (and fails validation the same way);
//   - times come back in UTC and zero times are absent from messages;
//   - a result's display order of targets (not part of the JSON) is not kept.
//
// Two things have no message form and are reported as errors: a variable
// with more than one distribution (a oneof holds one; such a document is
// invalid anyway) and a job or result state outside the five job states.
// A job's merged sampler statistics are the workers' working state and are
// not carried by the message.
package convert

import "errors"

// ErrUnrepresentable is wrapped by errors about values that have no message form.
var ErrUnrepresentable = errors.New("no message form")

// nilIfEmpty returns nil for an empty slice and a copy otherwise.
func nilIfEmpty[T any](s []T) []T {
	if len(s) == 0 {
		return nil
	}
	return append([]T(nil), s...)
}

// nonNil returns a copy of s that is never nil.
func nonNil[T any](s []T) []T {
	return append(make([]T, 0, len(s)), s...)
}

// copyMap copies m; the copy is nil when m is empty and keepEmpty is false.
func copyMap[V any](m map[string]V, keepEmpty bool) map[string]V {
	if len(m) == 0 && !keepEmpty {
		return nil
	}
	out := make(map[string]V, len(m))
	for k, v := range m {
		out[k] = v
	}
	return out
}

func optFloat(p *float64) *float64 {
	if p == nil {
		return nil
	}
	v := *p
	return &v
}
