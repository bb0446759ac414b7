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

// TestCodeSize fails on a non-test Go file over maxFileLines lines or a
// function over maxFuncLines lines.
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
		if n := strings.Count(string(src), "\n"); n > maxFileLines {
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
			if lines > maxFuncLines {
				t.Errorf("%s: func %s: %d lines, limit %d", rel, fn.Name.Name, lines, maxFuncLines)
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
}
