package main

import (
	"go/ast"
	"go/parser"
	"go/token"
	"io/fs"
	"path/filepath"
	"strings"
	"testing"
)

// TestExportedNamesHaveDocComments walks the whole module and fails on an
// exported type, function, method, constant or variable without a doc comment.
func TestExportedNamesHaveDocComments(t *testing.T) {
	root := "../.."
	var missing []string
	fset := token.NewFileSet()
	filepath.WalkDir(root, func(path string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		if d.IsDir() && (d.Name() == "testdata" || strings.HasPrefix(d.Name(), ".")) && path != root {
			return filepath.SkipDir
		}
		if d.IsDir() || !strings.HasSuffix(path, ".go") || strings.HasSuffix(path, "_test.go") {
			return nil
		}
		f, err := parser.ParseFile(fset, path, nil, parser.ParseComments)
		if err != nil {
			t.Errorf("%s: %v", path, err)
			return nil
		}
		if f.Name.Name == "main" {
			return nil
		}
		for _, decl := range f.Decls {
			switch d := decl.(type) {
			case *ast.FuncDecl:
				if d.Name.IsExported() && d.Doc == nil && exportedRecv(d) {
					missing = append(missing, fset.Position(d.Pos()).String()+" "+d.Name.Name)
				}
			case *ast.GenDecl:
				for _, s := range d.Specs {
					switch s := s.(type) {
					case *ast.TypeSpec:
						if s.Name.IsExported() && s.Doc == nil && d.Doc == nil {
							missing = append(missing, fset.Position(s.Pos()).String()+" "+s.Name.Name)
						}
					case *ast.ValueSpec:
						for _, n := range s.Names {
							if n.IsExported() && s.Doc == nil && d.Doc == nil && s.Comment == nil {
								missing = append(missing, fset.Position(n.Pos()).String()+" "+n.Name)
							}
						}
					}
				}
			}
		}
		return nil
	})
	for _, m := range missing {
		t.Errorf("exported name without a doc comment: %s", m)
	}
}

// exportedRecv reports whether a method's receiver type is exported (methods
// of unexported types are not part of the API).
func exportedRecv(d *ast.FuncDecl) bool {
	if d.Recv == nil || len(d.Recv.List) == 0 {
		return true
	}
	typ := d.Recv.List[0].Type
	if st, ok := typ.(*ast.StarExpr); ok {
		typ = st.X
	}
	if ix, ok := typ.(*ast.IndexExpr); ok {
		typ = ix.X
	}
	id, ok := typ.(*ast.Ident)
	return !ok || id.IsExported()
}
