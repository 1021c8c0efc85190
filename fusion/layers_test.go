package fusion_test

import (
	"encoding/json"
	"errors"
	"io"
	"os/exec"
	"slices"
	"strings"
	"testing"
)

// module is the module path; the layers below are relative to it.
const module = "reckon.example/"

// layer says which of our packages a package may depend on, directly or
// through others, in its code and in its tests (DEVELOPERS.md, "Design:
// Layers"). The order is proto, estimator < fusion < server/convert <
// server/journal < server < server/daemon < server/cmd < clients;
// fusion/fusiontest is the test harness of fusion, for tests of every layer
// above estimator and for the demo; fusion/calib calibrates a configuration
// from recorded samples, on fusion's types, without I/O; server/journal/faultfs holds the
// fault-injecting and crashable file systems for tests of the journal and
// the server; fusion/calib holds offline calibration tools over fusion.
type layer struct {
	pkg   string   // a package, or a tree with "/..."
	code  []string // what its code may depend on
	tests []string // what its tests may depend on besides that and itself
}

var (
	below   = []string{"proto/...", "estimator", "fusion"}
	convert = append(below[:3:3], "server/convert")
	server  = append(convert[:4:4], "server/journal")
	daemon  = append(server[:5:5], "server")
	binary  = append(daemon[:6:6], "server/daemon")
	layers  = []layer{
		{pkg: "proto/..."},
		{pkg: "estimator"},
		{pkg: "fusion", code: []string{"estimator"}, tests: []string{"fusion/fusiontest"}},
		{pkg: "fusion/fusiontest", code: []string{"estimator", "fusion"}},
		{pkg: "fusion/calib", code: []string{"estimator", "fusion"}, tests: []string{"fusion/fusiontest"}},
		{pkg: "server/convert", code: below, tests: []string{"fusion/fusiontest"}},
		{pkg: "server/journal", code: convert, tests: []string{"fusion/fusiontest", "server/journal/faultfs"}},
		{pkg: "server/journal/faultfs", code: server},
		{pkg: "server", code: server, tests: []string{"fusion/fusiontest", "server/journal/faultfs"}},
		{pkg: "server/daemon", code: daemon, tests: []string{"fusion/fusiontest"}},
		{pkg: "server/cmd/...", code: binary, tests: []string{"fusion/fusiontest"}},
		{pkg: "clients/...", code: append(binary[:7:7], "fusion/fusiontest", "fusion/calib", "clients/..."), tests: []string{"server/journal/faultfs"}},
	}
)

// pending are known breaches of the layers, each with what is to be done.
// The test fails when one of them is no longer there, so that the list
// only shrinks.
var pending = []struct{ pkg, imports, why string }{}

// goPackage is what go list says of one package.
type goPackage struct {
	ImportPath                      string
	Deps, TestImports, XTestImports []string
	Error                           *struct{ Err string }
}

// listPackages runs go list over the module.
func listPackages(t *testing.T) map[string]*goPackage {
	t.Helper()
	goTool, err := exec.LookPath("go")
	if err != nil {
		t.Fatalf("the layer check needs the go command: %v", err)
	}
	out, err := exec.Command(goTool, "list", "-e", "-json=ImportPath,Deps,TestImports,XTestImports,Error", module+"...").Output()
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		t.Fatalf("go list: %v\n%s", err, ee.Stderr)
	} else if err != nil {
		t.Fatal(err)
	}
	pkgs := map[string]*goPackage{}
	dec := json.NewDecoder(strings.NewReader(string(out)))
	for {
		p := &goPackage{}
		if err := dec.Decode(p); errors.Is(err, io.EOF) {
			break
		} else if err != nil {
			t.Fatal(err)
		}
		if p.Error != nil {
			t.Fatalf("go list %s: %s", p.ImportPath, p.Error.Err)
		}
		pkgs[strings.TrimPrefix(p.ImportPath, module)] = p
	}
	return pkgs
}

// matches reports whether pkg is pattern or, for "dir/...", in dir's tree.
func matches(pattern, pkg string) bool {
	if dir, ok := strings.CutSuffix(pattern, "/..."); ok {
		return pkg == dir || strings.HasPrefix(pkg, dir+"/")
	}
	return pkg == pattern
}

func matchesAny(patterns []string, pkg string) bool {
	return slices.ContainsFunc(patterns, func(p string) bool { return matches(p, pkg) })
}

// ours returns the packages of this module among paths, relative.
func ours(paths []string) []string {
	var r []string
	for _, p := range paths {
		if rel, ok := strings.CutPrefix(p, module); ok {
			r = append(r, rel)
		}
	}
	return r
}

// TestLayers: every package of the module depends only on the layers below
// it, and its tests import nothing of a layer above (go list, transitively).
func TestLayers(t *testing.T) {
	pkgs := listPackages(t)
	used := make([]bool, len(pending))
	for name, p := range pkgs {
		i := slices.IndexFunc(layers, func(l layer) bool { return matches(l.pkg, name) })
		if i < 0 {
			t.Errorf("package %s is in no layer: add it to the layers in fusion/layers_test.go", name)
			continue
		}
		l := layers[i]
		for _, d := range ours(p.Deps) {
			if !matchesAny(l.code, d) {
				t.Errorf("%s depends on %s, which its layer (%s) may not use", name, d, l.pkg)
			}
		}
		// A test's dependencies: what it imports and what those depend on.
		var testDeps []string
		for _, imp := range ours(append(p.TestImports, p.XTestImports...)) {
			testDeps = append(testDeps, imp)
			if q := pkgs[imp]; q != nil {
				testDeps = append(testDeps, ours(q.Deps)...)
			}
		}
		slices.Sort(testDeps)
		for _, d := range slices.Compact(testDeps) {
			if d == name || matchesAny(l.code, d) || matchesAny(l.tests, d) {
				continue
			}
			if j := slices.IndexFunc(pending, func(e struct{ pkg, imports, why string }) bool {
				return e.pkg == name && matches(e.imports, d)
			}); j >= 0 {
				used[j] = true
				t.Logf("pending: tests of %s depend on %s: %s", name, d, pending[j].why)
				continue
			}
			t.Errorf("tests of %s depend on %s, a layer their package (%s) may not use", name, d, l.pkg)
		}
	}
	for j, u := range used {
		if !u {
			t.Errorf("pending breach %s -> %s is gone: remove it from the list", pending[j].pkg, pending[j].imports)
		}
	}
	for _, must := range []string{"estimator", "fusion", "fusion/fusiontest", "server", "server/convert", "server/journal", "clients/client"} {
		if pkgs[must] == nil {
			t.Errorf("go list did not report %s", must)
		}
	}
}
