package journal_test

import (
	"strings"
	"testing"

	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// TestReadSetAside: a journal set aside when its robot was deleted reads
// under the name "{robot}.deleted-{unix ns}", each run of the name its
// own, beside the live one, and nothing can be written through it.
func TestReadSetAside(t *testing.T) {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	var asides []string
	for run, n := range []uint64{3, 5, 2} {
		w, err := journal.Create(dir, "cart", opening, journal.Options{FS: mem})
		if err != nil {
			t.Fatal(err)
		}
		addPairs(t, w, 1, n)
		w.Flush()
		w.Close()
		if run == 2 {
			break // the live one
		}
		if err := journal.SetAside(mem, dir, "cart"); err != nil {
			t.Fatal(err)
		}
		names, _ := mem.List(dir)
		for _, name := range names {
			if base, suffix, ok := strings.Cut(name, journal.DeletedMark); ok && base == "cart.manifest" && (len(asides) == 0 || !strings.HasSuffix(asides[0], suffix)) {
				asides = append(asides, "cart"+journal.DeletedMark+suffix)
			}
		}
	}
	if len(asides) != 2 {
		t.Fatalf("set aside as %v, want two", asides)
	}
	for k, c := range []struct {
		name  string
		pairs int
	}{{asides[0], 3}, {asides[1], 5}, {"cart", 2}} {
		sc, err := journal.ReadFS(mem, dir, c.name, journal.Visitor{ReadOnly: true})
		if err != nil || sc.Pairs != c.pairs {
			t.Errorf("%d: %s read %d pairs (%v), want %d", k, c.name, sc.Pairs, err, c.pairs)
		}
	}
	if _, err := journal.ReadFS(mem, dir, "cart.deleted-12", journal.Visitor{ReadOnly: true}); err == nil || !strings.Contains(err.Error(), "no journal for cart.deleted-12") {
		t.Errorf("a set-aside name that is not there: %v", err)
	}
	if _, err := journal.AsideFS(mem, asides[0][len("cart"):]).OpenFile(journal.ManifestPath(dir, "cart"), 1, 0); err == nil {
		t.Error("a set-aside journal opened for writing")
	}
}

// TestAside: which names are set-aside journals (SetAside's).
func TestAside(t *testing.T) {
	for _, c := range []struct {
		name, robot, suffix string
	}{
		{"cart.deleted-1733300000000000000", "cart", ".deleted-1733300000000000000"},
		{"cart-b.deleted-17.2", "cart-b", ".deleted-17.2"},
		{"cart", "", ""},
		{"cart.deleted-", "", ""},
		{"cart.deleted-12x", "", ""},
		{"cart.deleted-12.", "", ""},
		{"Cart.deleted-12", "", ""},
		{".deleted-12", "", ""},
	} {
		robot, suffix, ok := journal.Aside(c.name)
		if robot != c.robot || suffix != c.suffix || ok != (c.robot != "") {
			t.Errorf("Aside(%q) = %q, %q, %v", c.name, robot, suffix, ok)
		}
	}
}
