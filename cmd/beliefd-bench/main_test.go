package main

import (
	"bytes"
	"strings"
	"testing"
)

// Bad arguments are usage errors (exit 2) that say what is wrong; an
// unknown table name is refused before anything is measured.
func TestUsage(t *testing.T) {
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"-seeds", "-1"}, 2, "-seeds"},
		{[]string{"extra"}, 2, `unexpected argument "extra"`},
		{[]string{"-nosuch"}, 2, "nosuch"},
		{[]string{"-parts", "mse,plots"}, 1, `unknown part "plots"`},
	} {
		var out, errb bytes.Buffer
		if code := run(tc.args, &out, &errb); code != tc.code || !strings.Contains(errb.String(), tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want exit %d and %q", tc.args, code, errb.String(), tc.code, tc.want)
		}
	}
}
