package examples

import "testing"

// BenchmarkLoad decodes and compiles each example, as `serve` does when it
// preloads them and `beliefd example` does when it lists them; compare the
// examples side by side:
//
//	go test -run '^$' -bench Load -benchmem ./service/examples/
func BenchmarkLoad(b *testing.B) {
	for _, name := range Names() {
		b.Run(name, func(b *testing.B) {
			raw, err := Raw(name)
			if err != nil {
				b.Fatal(err)
			}
			b.SetBytes(int64(len(raw)))
			b.ReportAllocs()
			for b.Loop() {
				if _, _, err := Load(name); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
