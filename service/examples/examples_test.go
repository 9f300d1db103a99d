package examples

import "testing"

func TestExamplesCompile(t *testing.T) {
	if len(Names()) == 0 {
		t.Fatal("no examples embedded")
	}
	for _, name := range Names() {
		doc, net, err := Load(name)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if doc.Name != name {
			t.Errorf("file %s.json holds model %q; keep file and model names equal", name, doc.Name)
		}
		if len(net.Vars) < 10 {
			t.Errorf("%s: only %d variables", name, len(net.Vars))
		}
	}
	if _, err := Raw("nope"); err == nil {
		t.Error("unknown example accepted")
	}
}
