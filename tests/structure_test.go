package tests

import (
	"go/ast"
	"go/parser"
	"go/token"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// House limits on the size of the code: a file a reader can hold, a
// function a reader can follow.
const (
	maxFileLines = 500
	maxFuncLines = 80
)

// sizeExceptions are the files and functions over the limits when the
// limits were set, by "path" or "path:func". Table data (the detector
// defaults) stays; the others are to be cut, and the list only shrinks.
var sizeExceptions = map[string]bool{
	"analyze/detector_config.go:DefaultDetectorConfig": true, // table data
}

// TestCodeSize fails on a non-test Go file over maxFileLines lines or a
// function over maxFuncLines lines, sizeExceptions aside.
func TestCodeSize(t *testing.T) {
	root := ".."
	fset := token.NewFileSet()
	err := filepath.WalkDir(root, func(path string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		if d.IsDir() {
			if name := d.Name(); strings.HasPrefix(name, ".") && path != root || name == "testdata" {
				return filepath.SkipDir
			}
			return nil
		}
		if !strings.HasSuffix(path, ".go") || strings.HasSuffix(path, "_test.go") {
			return nil
		}
		src, err := os.ReadFile(path)
		if err != nil {
			return err
		}
		rel, _ := filepath.Rel(root, path)
		rel = filepath.ToSlash(rel)
		if n := strings.Count(string(src), "\n"); n > maxFileLines && !sizeExceptions[rel] {
			t.Errorf("%s: %d lines, limit %d", rel, n, maxFileLines)
		}
		f, err := parser.ParseFile(fset, path, src, 0)
		if err != nil {
			return err
		}
		for _, decl := range f.Decls {
			fn, ok := decl.(*ast.FuncDecl)
			if !ok || fn.Body == nil {
				continue
			}
			lines := fset.Position(fn.End()).Line - fset.Position(fn.Pos()).Line + 1
			if lines > maxFuncLines && !sizeExceptions[rel+":"+fn.Name.Name] {
				t.Errorf("%s: func %s: %d lines, limit %d", rel, fn.Name.Name, lines, maxFuncLines)
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
}

// importRules lists, per package directory prefix, import paths its
// non-test files must not use: data flows ingest → analyze → alerts →
// daemon, and only the command line uses cobra.
var importRules = []struct{ dir, forbidden string }{
	{"ingest", "trapline/analyze"},
	{"ingest", "trapline/alerts"},
	{"ingest", "trapline/daemon"},
	{"analyze", "trapline/alerts"},
	{"analyze", "trapline/daemon"},
	{"alerts", "trapline/daemon"},
	{"daemon/bus", "trapline/daemon/cli"},
	{"daemon/bus", "github.com/spf13/cobra"},
	{"daemon/", "github.com/spf13/cobra"}, // daemon itself, not daemon/cli
}

// TestImportDirection checks importRules on every non-test file.
func TestImportDirection(t *testing.T) {
	root := ".."
	fset := token.NewFileSet()
	err := filepath.WalkDir(root, func(path string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() || !strings.HasSuffix(path, ".go") || strings.HasSuffix(path, "_test.go") {
			return err
		}
		rel, _ := filepath.Rel(root, path)
		rel = filepath.ToSlash(rel)
		f, err := parser.ParseFile(fset, path, nil, parser.ImportsOnly)
		if err != nil {
			return err
		}
		for _, r := range importRules {
			in := strings.HasPrefix(rel, r.dir+"/")
			if r.dir == "daemon/" {
				in = strings.HasPrefix(rel, "daemon/") && !strings.HasPrefix(rel, "daemon/cli/")
			}
			if !in {
				continue
			}
			for _, im := range f.Imports {
				if p := strings.Trim(im.Path.Value, `"`); p == r.forbidden || strings.HasPrefix(p, r.forbidden+"/") {
					t.Errorf("%s imports %s", rel, p)
				}
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
}
