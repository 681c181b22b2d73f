package analysis

import (
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"unicode/utf8"
)

// MaxOutcomeBytes bounds an outcome file, so that a wrong file (a video, a
// database) fails with a message instead of filling memory.
const MaxOutcomeBytes = 512 << 20

// Table is an outcome file as a survey platform exports it: a header row and
// data rows of text cells. An empty cell is a missing value.
type Table struct {
	Name      string     // the file's name, for messages
	Delimiter rune       // ',' or ';', detected from the header row
	Header    []string   // column names, trimmed
	Rows      [][]string // data rows, each as long as Header, cells trimmed
	// RowNumbers holds each data row's number as a spreadsheet counts it:
	// the header is row 1, the first data row row 2 (quoted line breaks
	// make a row span lines, but it keeps one number).
	RowNumbers []int
}

// InputError is bad input the researcher must fix: an outcome file, a flag
// or a design that cannot be analysed as given. Each problem is one plain
// sentence naming rows, columns or arms.
type InputError struct {
	Problems []string
}

func (e *InputError) Error() string { return strings.Join(e.Problems, "\n") }

func inputErr(format string, args ...any) error {
	return &InputError{Problems: []string{fmt.Sprintf(format, args...)}}
}

// ReadOutcomes reads an outcome file: UTF-8 with or without a byte-order
// mark, comma or semicolon delimited (whichever the header row uses more
// often outside quotes), fields optionally quoted with double quotes, empty
// cells missing. Every row must have as many cells as the header.
func ReadOutcomes(r io.Reader, name string) (*Table, error) {
	data, err := io.ReadAll(io.LimitReader(r, MaxOutcomeBytes+1))
	if err != nil {
		return nil, fmt.Errorf("read outcome file %s: %w", name, err)
	}
	if len(data) > MaxOutcomeBytes {
		return nil, inputErr("%s: the outcome file is larger than %d MiB", name, MaxOutcomeBytes>>20)
	}
	data = bytes.TrimPrefix(data, []byte("\xef\xbb\xbf"))
	if !utf8.Valid(data) {
		line := 1 + bytes.Count(data[:firstInvalidUTF8(data)], []byte("\n"))
		return nil, inputErr("%s: line %d is not valid UTF-8 text; export the file as UTF-8", name, line)
	}
	if len(bytes.TrimSpace(data)) == 0 {
		return nil, inputErr("%s: the outcome file is empty", name)
	}
	t := &Table{Name: name, Delimiter: detectDelimiter(data)}
	cr := csv.NewReader(bytes.NewReader(data))
	cr.Comma = t.Delimiter
	cr.FieldsPerRecord = -1 // checked below, with a clearer message
	cr.ReuseRecord = false
	header, err := cr.Read()
	if err != nil {
		return nil, csvErr(name, 1, err)
	}
	t.Header = trimAll(header)
	seen := make(map[string]int, len(t.Header))
	for i, h := range t.Header {
		if h == "" {
			continue
		}
		if j, ok := seen[h]; ok {
			return nil, inputErr("%s: column %q appears twice in the header (columns %d and %d)", name, h, j+1, i+1)
		}
		seen[h] = i
	}
	for row := 2; ; row++ {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, csvErr(name, row, err)
		}
		if len(rec) == 1 && strings.TrimSpace(rec[0]) == "" && len(t.Header) > 1 {
			continue // a blank line, as spreadsheets leave at the end
		}
		if len(rec) != len(t.Header) {
			return nil, inputErr("%s: row %d has %d cells, but the header has %d columns", name, row, len(rec), len(t.Header))
		}
		t.Rows = append(t.Rows, trimAll(rec))
		t.RowNumbers = append(t.RowNumbers, row)
	}
	return t, nil
}

func firstInvalidUTF8(b []byte) int {
	for i := 0; i < len(b); {
		r, size := utf8.DecodeRune(b[i:])
		if r == utf8.RuneError && size <= 1 {
			return i
		}
		i += size
	}
	return len(b)
}

// detectDelimiter counts commas and semicolons outside double quotes on the
// header row (up to its first unquoted line break); semicolon wins only when
// it is more frequent.
func detectDelimiter(data []byte) rune {
	commas, semis, quoted := 0, 0, false
	for _, c := range data {
		switch {
		case c == '"':
			quoted = !quoted
		case quoted:
		case c == '\n':
			if semis > commas {
				return ';'
			}
			return ','
		case c == ',':
			commas++
		case c == ';':
			semis++
		}
	}
	if semis > commas {
		return ';'
	}
	return ','
}

func csvErr(name string, row int, err error) error {
	var pe *csv.ParseError
	if errors.As(err, &pe) {
		return inputErr("%s: row %d (line %d, column %d): %v", name, row, pe.StartLine, pe.Column, pe.Err)
	}
	return fmt.Errorf("read outcome file %s: row %d: %w", name, row, err)
}

func trimAll(rec []string) []string {
	out := make([]string, len(rec))
	for i, c := range rec {
		out[i] = strings.TrimSpace(c)
	}
	return out
}

// Column returns the index of a column, or an InputError that lists the
// columns the file has.
func (t *Table) Column(name string) (int, error) {
	for i, h := range t.Header {
		if h == name && name != "" {
			return i, nil
		}
	}
	return -1, inputErr("%s: no column %q; the columns are %s", t.Name, name, quoteList(t.Header))
}

// Numbers reads a column as numbers: NaN marks a missing (empty) cell.
// Cells that are not numbers are an InputError naming their rows. With a
// semicolon delimiter a decimal comma (3,5) is read as a decimal point, as
// the spreadsheets that write semicolons do.
func (t *Table) Numbers(name string) ([]float64, error) {
	col, err := t.Column(name)
	if err != nil {
		return nil, err
	}
	out := make([]float64, len(t.Rows))
	var bad []string
	missing := 0
	for i, rec := range t.Rows {
		cell := rec[col]
		if cell == "" {
			out[i] = math.NaN()
			missing++
			continue
		}
		if t.Delimiter == ';' && strings.Count(cell, ",") == 1 && !strings.Contains(cell, ".") {
			cell = strings.Replace(cell, ",", ".", 1)
		}
		v, err := strconv.ParseFloat(cell, 64)
		if err != nil || math.IsInf(v, 0) || math.IsNaN(v) {
			bad = append(bad, fmt.Sprintf("row %d (%q)", t.RowNumbers[i], clip(rec[col], 20)))
			continue
		}
		out[i] = v
	}
	if len(bad) > 0 {
		return nil, inputErr("%s: column %q has cells that are not numbers: %s", t.Name, name, listSome(bad, 10))
	}
	if missing == len(t.Rows) {
		return nil, inputErr("%s: column %q is empty in every row", t.Name, name)
	}
	return out, nil
}

func clip(s string, n int) string {
	if utf8.RuneCountInString(s) <= n {
		return s
	}
	r := []rune(s)
	return string(r[:n]) + "…"
}

// listSome joins up to n items and says how many more there are.
func listSome(items []string, n int) string {
	if len(items) <= n {
		return strings.Join(items, ", ")
	}
	return strings.Join(items[:n], ", ") + fmt.Sprintf(" and %d more", len(items)-n)
}

func quoteList(names []string) string {
	q := make([]string, 0, len(names))
	for _, n := range names {
		if n != "" {
			q = append(q, strconv.Quote(n))
		}
	}
	return strings.Join(q, ", ")
}
