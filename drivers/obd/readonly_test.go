package obd

import (
	"go/ast"
	"go/parser"
	"go/token"
	"path/filepath"
	"reflect"
	"strconv"
	"strings"
	"testing"
)

// readServices is the complete set of service bytes that may reach the bus:
// SAE J1979 services 01, 02, 03, 07, 09 and ISO 14229-1 service 22.
var readServices = map[byte]bool{0x01: true, 0x02: true, 0x03: true, 0x07: true, 0x09: true, 0x22: true}

// allConstructors builds one Request per constructor from fuzzable inputs.
func allConstructors(a, b byte, n int, did uint16) []Request {
	var out []Request
	pids := make([]PID, 0, 8)
	for i := 0; i < n%9; i++ {
		pids = append(pids, PID(a+byte(i)*b))
	}
	if r, err := CurrentData(pids...); err == nil {
		out = append(out, r)
	}
	out = append(out, FreezeFrame(PID(a), b), StoredDTCs(), PendingDTCs(), VehicleInfo(PID(a)), ReadDID(did),
		Signal{Name: "x", Length: 1, Scale: 1, UsePID: a&1 == 1, PID: PID(a), DID: did}.Request())
	return out
}

func checkReadOnly(t *testing.T, r Request) {
	t.Helper()
	p, err := r.AppendPayload(nil)
	if err != nil {
		t.Fatalf("%v: %v", r, err)
	}
	if len(p) < 1 || len(p) > 7 {
		t.Fatalf("%v: payload length %d, want 1–7 (one single frame)", r, len(p))
	}
	if !readServices[p[0]] {
		t.Fatalf("%v: service byte 0x%02X is not a read service", r, p[0])
	}
	if p[0] != r.Service() || len(p) != r.PayloadLen() {
		t.Fatalf("%v: Service/PayloadLen disagree with payload % X", r, p)
	}
}

func TestConstructorsOnlyReadServices(t *testing.T) {
	seen := map[byte]bool{}
	for a := 0; a < 256; a++ {
		for _, n := range []int{0, 1, 2, 6, 7} {
			for _, r := range allConstructors(byte(a), 3, n, uint16(a)<<8|0x5A) {
				checkReadOnly(t, r)
				seen[r.Service()] = true
			}
		}
	}
	for s := range readServices {
		if !seen[s] {
			t.Errorf("service 0x%02X never produced: the enumeration misses a constructor", s)
		}
	}
	var zero Request
	if p, err := zero.AppendPayload(nil); err == nil || len(p) != 0 {
		t.Fatalf("zero Request encoded to % X, %v; want ErrZeroRequest and no bytes", p, err)
	}
}

func FuzzRequestConstructors(f *testing.F) {
	f.Add(byte(0x0C), byte(1), 3, uint16(0xF190))
	f.Add(byte(0x00), byte(0x20), 6, uint16(0))
	f.Add(byte(0xFF), byte(0), 7, uint16(0xFFFF))
	f.Fuzz(func(t *testing.T, a, b byte, n int, did uint16) {
		if n < 0 {
			n = -n
		}
		for _, r := range allConstructors(a, b, n, did) {
			checkReadOnly(t, r)
		}
	})
}

// TestRequestHasNoExportedFields: a Request can only come from a constructor.
func TestRequestHasNoExportedFields(t *testing.T) {
	rt := reflect.TypeOf(Request{})
	for i := 0; i < rt.NumField(); i++ {
		if rt.Field(i).IsExported() {
			t.Errorf("Request field %s is exported", rt.Field(i).Name)
		}
	}
	if rt.Field(0).Type.Kind() != reflect.Uint8 || rt.Field(0).Type.PkgPath() == "" || rt.Field(0).Type.Name() != "service" {
		t.Errorf("Request.svc must have the unexported type service")
	}
}

// TestNoRawServiceConstruction parses the package source and checks that
// (1) the only exported functions returning Request are the named read
// constructors; (2) no exported function or method takes a parameter of type
// service (an untyped constant would convert); (3) the service constants are
// exactly the read services; (4) every Request literal and every assignment
// to .svc uses one of those named constants.
func TestNoRawServiceConstruction(t *testing.T) {
	fset := token.NewFileSet()
	names, err := filepath.Glob("*.go")
	if err != nil {
		t.Fatal(err)
	}
	var files []*ast.File
	for _, n := range names {
		if strings.HasSuffix(n, "_test.go") {
			continue
		}
		f, err := parser.ParseFile(fset, n, nil, 0)
		if err != nil {
			t.Fatal(err)
		}
		files = append(files, f)
	}
	if len(files) < 5 {
		t.Fatalf("parsed only %d files", len(files))
	}
	conversions := 0
	allowedCtors := map[string]bool{"CurrentData": true, "FreezeFrame": true, "StoredDTCs": true,
		"PendingDTCs": true, "VehicleInfo": true, "ReadDID": true, "Signal.Request": true}
	svcConsts := map[string]byte{}
	for _, file := range files {
		for _, d := range file.Decls {
			gd, ok := d.(*ast.GenDecl)
			if !ok || gd.Tok != token.CONST {
				continue
			}
			for _, sp := range gd.Specs {
				vs := sp.(*ast.ValueSpec)
				if id, ok := vs.Type.(*ast.Ident); ok && id.Name == "service" {
					for i, n := range vs.Names {
						lit, ok := vs.Values[i].(*ast.BasicLit)
						if !ok {
							t.Fatalf("service constant %s is not a literal", n.Name)
						}
						v, err := strconv.ParseInt(lit.Value, 0, 64)
						if err != nil || v > 0xFF || !readServices[byte(v)] {
							t.Errorf("service constant %s = %s is not a read service", n.Name, lit.Value)
						}
						svcConsts[n.Name] = byte(v)
					}
				}
			}
		}
	}
	if len(svcConsts) != len(readServices) {
		t.Errorf("found %d service constants, want %d", len(svcConsts), len(readServices))
	}
	for _, file := range files {
		for _, d := range file.Decls {
			fd, ok := d.(*ast.FuncDecl)
			if !ok {
				continue
			}
			name := fd.Name.Name
			if fd.Recv != nil {
				name = recvName(fd.Recv.List[0].Type) + "." + name
			}
			exported := fd.Name.IsExported()
			if exported {
				for _, p := range fd.Type.Params.List {
					if typeMentions(p.Type, "service") {
						t.Errorf("%s takes a service parameter", name)
					}
				}
				if fd.Type.Results != nil {
					for _, r := range fd.Type.Results.List {
						if typeMentions(r.Type, "Request") && !allowedCtors[name] {
							t.Errorf("exported %s returns a Request but is not an allowed read constructor", name)
						}
					}
				}
			}
		}
		ast.Inspect(file, func(n ast.Node) bool {
			switch x := n.(type) {
			case *ast.CompositeLit:
				if id, ok := x.Type.(*ast.Ident); ok && id.Name == "Request" {
					for _, el := range x.Elts {
						kv, ok := el.(*ast.KeyValueExpr)
						if !ok {
							t.Errorf("%v: positional Request literal", fset.Position(x.Pos()))
							continue
						}
						if k, _ := kv.Key.(*ast.Ident); k != nil && k.Name == "svc" {
							if v, ok := kv.Value.(*ast.Ident); !ok || svcConsts[v.Name] == 0 {
								t.Errorf("%v: Request.svc set from something other than a named read-service constant", fset.Position(kv.Pos()))
							}
						}
					}
				}
			case *ast.AssignStmt:
				for i, l := range x.Lhs {
					if se, ok := l.(*ast.SelectorExpr); ok && se.Sel.Name == "svc" {
						v, ok := x.Rhs[i].(*ast.Ident)
						if !ok || svcConsts[v.Name] == 0 {
							t.Errorf("%v: assignment to .svc from something other than a named read-service constant", fset.Position(x.Pos()))
						}
					}
				}
			case *ast.CallExpr: // conversions service(x) outside comparisons would mint a byte
				if id, ok := x.Fun.(*ast.Ident); ok && id.Name == "service" {
					conversions++
				}
			}
			return true
		})
	}
	// ParseResponse converts a received byte to service only to compare it.
	if conversions > 1 {
		t.Errorf("%d conversions to service in the package; only the one comparison in ParseResponse is allowed", conversions)
	}
}

func recvName(e ast.Expr) string {
	if s, ok := e.(*ast.StarExpr); ok {
		e = s.X
	}
	if id, ok := e.(*ast.Ident); ok {
		return id.Name
	}
	return "?"
}

func typeMentions(e ast.Expr, name string) bool {
	found := false
	ast.Inspect(e, func(n ast.Node) bool {
		if id, ok := n.(*ast.Ident); ok && id.Name == name {
			found = true
		}
		return true
	})
	return found
}
