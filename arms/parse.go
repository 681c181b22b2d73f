package arms

import (
	"errors"
	"fmt"
	"os"
	"sort"
	"strings"
	"unicode/utf8"

	"github.com/goccy/go-yaml"
	"github.com/goccy/go-yaml/ast"
	"github.com/goccy/go-yaml/parser"
)

// MaxStudyFileSize bounds a study file; larger files are refused before parsing.
const MaxStudyFileSize = 1 << 20

// Problem is one error in a study file, at a line and column (both 1-based;
// 0 when the position is unknown).
type Problem struct {
	Line, Col int
	Path      string // where in the study, e.g. arms.debate.replies.min
	Msg       string // a plain sentence
}

// Problems is every error found in one study file.
type Problems struct {
	File string
	List []Problem
}

// Error lists the problems, one "file:line:column: message" per line.
func (p *Problems) Error() string {
	var b strings.Builder
	for i, q := range p.List {
		if i > 0 {
			b.WriteByte('\n')
		}
		fmt.Fprintf(&b, "%s:%d:%d: %s", p.File, q.Line, q.Col, q.Msg)
	}
	return b.String()
}

// ParseFile reads and parses the study file at path.
func ParseFile(path string) (*Study, []byte, error) {
	fi, err := os.Stat(path)
	if err != nil {
		return nil, nil, fmt.Errorf("open study %q: %w", path, err)
	}
	if fi.Size() > MaxStudyFileSize {
		return nil, nil, fmt.Errorf("open study %q: file is %d bytes, the limit is %d", path, fi.Size(), MaxStudyFileSize)
	}
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, nil, fmt.Errorf("open study %q: %w", path, err)
	}
	s, err := Parse(path, data)
	return s, data, err
}

// Parse parses and validates a study file. name is used in error positions.
// On failure the error is a *Problems listing everything found.
func Parse(name string, data []byte) (*Study, error) {
	if len(data) > MaxStudyFileSize {
		return nil, &Problems{File: name, List: []Problem{{Line: 1, Col: 1, Msg: fmt.Sprintf("the file is %d bytes; the limit is %d", len(data), MaxStudyFileSize)}}}
	}
	if strings.TrimSpace(string(data)) == "" {
		return nil, &Problems{File: name, List: []Problem{{Line: 1, Col: 1, Msg: "the study file is empty"}}}
	}
	if line, col, bad := invalidUTF8(data); bad {
		return nil, &Problems{File: name, List: []Problem{{Line: line, Col: col, Msg: "the file is not valid UTF-8 text; save it as UTF-8"}}}
	}
	file, err := parser.ParseBytes(data, 0)
	if err != nil {
		return nil, &Problems{File: name, List: []Problem{yamlProblem(err)}}
	}
	if body := nodeAt(file); body == nil || body.Type() == ast.NullType {
		// only comments, a bare document marker or a null: no content at all
		return nil, &Problems{File: name, List: []Problem{{Line: 1, Col: 1, Msg: "the study file is empty"}}}
	}
	var s Study
	if err := decode(data, &s); err != nil {
		return nil, &Problems{File: name, List: []Problem{decodeProblem(file, err)}}
	}
	v := &validator{file: file, s: &s, probs: &Problems{File: name}}
	v.s.ArmOrder = v.keyOrder("arms")
	v.validate()
	if len(v.probs.List) > 0 {
		sort.SliceStable(v.probs.List, func(i, j int) bool {
			a, b := v.probs.List[i], v.probs.List[j]
			if a.Line != b.Line {
				return a.Line < b.Line
			}
			return a.Col < b.Col
		})
		return nil, v.probs
	}
	return &s, nil
}

// invalidUTF8 finds the first byte that is not part of valid UTF-8, which
// YAML 1.2 (section 5.2) does not allow in a UTF-8 stream. Without this check
// the bytes would be replaced by U+FFFD in the canonical form, so two
// different files could share a version hash.
func invalidUTF8(data []byte) (line, col int, bad bool) {
	line, col = 1, 1
	for len(data) > 0 {
		r, size := utf8.DecodeRune(data)
		if r == utf8.RuneError && size <= 1 {
			return line, col, true
		}
		if r == '\n' {
			line, col = line+1, 1
		} else {
			col++
		}
		data = data[size:]
	}
	return 0, 0, false
}

// errDecoderPanic reports a panic inside the YAML decoder.
var errDecoderPanic = errors.New("the YAML reader failed on this file")

// decode unmarshals a study file. go-yaml v1.19 panics on some inputs, such as
// a tag with no value where a list is expected (`blocks: !!seq`, goccy/go-yaml
// issue 735); a study file is a researcher's input, so that panic becomes an
// error here.
func decode(data []byte, s *Study) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("%w: %v", errDecoderPanic, r)
		}
	}()
	return yaml.UnmarshalWithOptions(data, s, yaml.DisallowUnknownField())
}

// decodeProblem places a decoding error; after a decoder panic it points at
// the first tag without a value, the known cause.
func decodeProblem(file *ast.File, err error) Problem {
	if !errors.Is(err, errDecoderPanic) {
		return yamlProblem(err)
	}
	for _, n := range ast.FilterFile(ast.TagType, file) {
		tag, ok := n.(*ast.TagNode)
		if !ok || (tag.Value != nil && tag.Value.Type() != ast.NullType) || tag.Start == nil || tag.Start.Position == nil {
			continue
		}
		return Problem{Line: tag.Start.Position.Line, Col: tag.Start.Position.Column, Msg: fmt.Sprintf("the tag %s has no value; remove the tag or give it a value", tag.Start.Value)}
	}
	return Problem{Line: 1, Col: 1, Msg: "the YAML reader failed on this file; check its tags (words starting with !)"}
}

// yamlProblem turns a go-yaml error into a Problem with its position.
func yamlProblem(err error) Problem {
	var ye yaml.Error
	if errors.As(err, &ye) {
		p := Problem{Msg: plainYAMLMessage(ye.GetMessage())}
		if tk := ye.GetToken(); tk != nil && tk.Position != nil {
			p.Line, p.Col = tk.Position.Line, tk.Position.Column
		}
		return p
	}
	return Problem{Line: 1, Col: 1, Msg: err.Error()}
}

// plainYAMLMessage rewords go-yaml's messages where they name Go types.
func plainYAMLMessage(m string) string {
	if f, ok := strings.CutPrefix(m, "unknown field "); ok {
		return fmt.Sprintf("unknown field %s (check its spelling and its indentation)", f)
	}
	if strings.Contains(m, "cannot unmarshal") {
		m = strings.ReplaceAll(m, "cannot unmarshal", "cannot read")
		m = strings.NewReplacer("into Go struct field ", "as ", "into Go value of type ", "as ", "string", "text", "uint64", "a whole number", "int", "a whole number", "float64", "a number", "bool", "true or false", "[]text", "a list", "map[text]*arms.", "a map of ", "arms.", "").Replace(m)
	}
	return m
}

// nodeAt finds the node at a path of mapping keys and list indexes.
func nodeAt(file *ast.File, path ...string) ast.Node {
	if file == nil || len(file.Docs) == 0 {
		return nil
	}
	var n ast.Node = file.Docs[0].Body
	for _, key := range path {
		n = child(n, key)
		if n == nil {
			return nil
		}
	}
	return unwrap(n)
}

// unwrap returns the node under anchors, tags and comments, so that
// `arms: &base {...}` is read like `arms: {...}`.
func unwrap(n ast.Node) ast.Node {
	for {
		switch m := n.(type) {
		case *ast.AnchorNode:
			n = m.Value
		case *ast.TagNode:
			n = m.Value
		case *ast.CommentGroupNode, *ast.CommentNode, nil:
			return nil
		default:
			return n
		}
	}
}

func child(n ast.Node, key string) ast.Node {
	switch m := n.(type) {
	case *ast.MappingNode:
		for _, mv := range m.Values {
			if mv.Key != nil && mv.Key.GetToken() != nil && mv.Key.GetToken().Value == key {
				return mv.Value
			}
		}
	case *ast.MappingValueNode:
		if m.Key != nil && m.Key.GetToken() != nil && m.Key.GetToken().Value == key {
			return m.Value
		}
	case *ast.SequenceNode:
		var i int
		if _, err := fmt.Sscan(key, &i); err == nil && i >= 0 && i < len(m.Values) {
			return m.Values[i]
		}
	case *ast.TagNode:
		return child(m.Value, key)
	case *ast.AnchorNode:
		return child(m.Value, key)
	}
	return nil
}

// keyNode returns the key token position of the last element of path, for
// errors about a key itself (an arm without a ratio, a duplicate name).
func keyPos(file *ast.File, path ...string) (int, int, bool) {
	if len(path) == 0 {
		return 0, 0, false
	}
	parent := nodeAt(file, path[:len(path)-1]...)
	key := path[len(path)-1]
	var values []*ast.MappingValueNode
	switch m := parent.(type) {
	case *ast.MappingNode:
		values = m.Values
	case *ast.MappingValueNode:
		values = []*ast.MappingValueNode{m}
	}
	for _, mv := range values {
		if tk := mv.Key.GetToken(); tk != nil && tk.Value == key && tk.Position != nil {
			return tk.Position.Line, tk.Position.Column, true
		}
	}
	return 0, 0, false
}

type validator struct {
	file  *ast.File
	s     *Study
	probs *Problems
}

// at reports a problem at the value of path, or at the nearest existing parent.
func (v *validator) at(path []string, format string, args ...any) {
	p := Problem{Path: strings.Join(path, "."), Msg: fmt.Sprintf(format, args...)}
	for i := len(path); i >= 0; i-- {
		if n := nodeAt(v.file, path[:i]...); n != nil && n.GetToken() != nil && n.GetToken().Position != nil {
			p.Line, p.Col = n.GetToken().Position.Line, n.GetToken().Position.Column
			if blockMapping(n) || i < len(path) {
				// a block mapping's token is the colon of its first key, and
				// a missing field has no position: point at the key instead
				if l, c, ok := keyPos(v.file, path[:i]...); ok {
					p.Line, p.Col = l, c
				}
			}
			break
		}
	}
	if p.Line == 0 {
		p.Line, p.Col = 1, 1
	}
	v.probs.List = append(v.probs.List, p)
}

// blockMapping reports whether n is a mapping written in block style.
func blockMapping(n ast.Node) bool {
	switch m := n.(type) {
	case *ast.MappingNode:
		return !m.IsFlowStyle
	case *ast.MappingValueNode:
		return true
	}
	return false
}

// atKey reports a problem at the key of path.
func (v *validator) atKey(path []string, format string, args ...any) {
	if l, c, ok := keyPos(v.file, path...); ok {
		v.probs.List = append(v.probs.List, Problem{Line: l, Col: c, Path: strings.Join(path, "."), Msg: fmt.Sprintf(format, args...)})
		return
	}
	v.at(path, format, args...)
}

// keyOrder returns the keys of the mapping at path in file order.
func (v *validator) keyOrder(path ...string) []string {
	var values []*ast.MappingValueNode
	switch m := nodeAt(v.file, path...).(type) {
	case *ast.MappingNode:
		values = m.Values
	case *ast.MappingValueNode:
		values = []*ast.MappingValueNode{m}
	}
	keys := make([]string, 0, len(values))
	for _, mv := range values {
		if tk := mv.Key.GetToken(); tk != nil {
			keys = append(keys, tk.Value)
		}
	}
	return keys
}

// p builds a path.
func p(parts ...string) []string { return parts }
