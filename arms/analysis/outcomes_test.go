package analysis

import (
	"errors"
	"math"
	"strings"
	"testing"
)

func TestReadOutcomes(t *testing.T) {
	ok := []struct {
		name, in string
		delim    rune
		header   []string
		rows     [][]string
		numbers  []int
	}{
		// RFC 4180 quoting: a quoted field may hold the delimiter, a doubled
		// quote and a line break.
		{"OKCommaQuoted", "rid,post,note\nR1,3.5,\"a, \"\"quoted\"\"\nnote\"\nR2,,plain\n", ',',
			[]string{"rid", "post", "note"}, [][]string{{"R1", "3.5", "a, \"quoted\"\nnote"}, {"R2", "", "plain"}}, []int{2, 3}},
		{"OKSemicolonBOM", "\ufeffrid;post\r\nR1;4,25\r\nR2;5\r\n", ';',
			[]string{"rid", "post"}, [][]string{{"R1", "4,25"}, {"R2", "5"}}, []int{2, 3}},
		{"OKHeaderCommaInQuotesSemicolonDelimiter", "\"id, survey\";post\nR1;1\n", ';',
			[]string{"id, survey", "post"}, [][]string{{"R1", "1"}}, []int{2}},
		{"OKTrailingBlankLineAndSpaces", "rid , post\n R1 , 2 \n\n", ',',
			[]string{"rid", "post"}, [][]string{{"R1", "2"}}, []int{2}},
	}
	for _, c := range ok {
		t.Run(c.name, func(t *testing.T) {
			tab, err := ReadOutcomes(strings.NewReader(c.in), "o.csv")
			if err != nil {
				t.Fatal(err)
			}
			if tab.Delimiter != c.delim {
				t.Errorf("delimiter: got %q, want %q", tab.Delimiter, c.delim)
			}
			if strings.Join(tab.Header, "|") != strings.Join(c.header, "|") {
				t.Errorf("header: got %q, want %q", tab.Header, c.header)
			}
			if len(tab.Rows) != len(c.rows) {
				t.Fatalf("rows: got %d, want %d", len(tab.Rows), len(c.rows))
			}
			for i := range c.rows {
				if strings.Join(tab.Rows[i], "|") != strings.Join(c.rows[i], "|") {
					t.Errorf("row %d: got %q, want %q", i, tab.Rows[i], c.rows[i])
				}
				if tab.RowNumbers[i] != c.numbers[i] {
					t.Errorf("row number %d: got %d, want %d", i, tab.RowNumbers[i], c.numbers[i])
				}
			}
		})
	}
	bad := []struct{ name, in, want string }{
		{"ErrEmpty", "", "empty"},
		{"ErrInvalidUTF8", "rid,post\nR1,\xff\n", "line 2 is not valid UTF-8"},
		{"ErrRagged", "rid,post\nR1,1\nR2,2,3\n", "row 3 has 3 cells, but the header has 2"},
		{"ErrDuplicateHeader", "rid,post,post\n", `column "post" appears twice`},
		{"ErrUnclosedQuote", "rid,post\nR1,\"3\n", "row 2"},
		{"ErrBareQuote", "rid,post\nR1,3\"x\n", "row 2"},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			tab, err := ReadOutcomes(strings.NewReader(c.in), "o.csv")
			var ie *InputError
			if !errors.As(err, &ie) || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("got table %v, error %v; want an InputError containing %q", tab, err, c.want)
			}
		})
	}
}

func TestNumbers(t *testing.T) {
	tab, err := ReadOutcomes(strings.NewReader("rid;post;word;blank\nR1;4,5;x;\nR2;;y;\nR3;-2e1;7;\n"), "o.csv")
	if err != nil {
		t.Fatal(err)
	}
	t.Run("OKDecimalCommaAndMissing", func(t *testing.T) {
		v, err := tab.Numbers("post")
		if err != nil {
			t.Fatal(err)
		}
		if v[0] != 4.5 || !math.IsNaN(v[1]) || v[2] != -20 {
			t.Fatalf("got %v, want [4.5 NaN -20]", v)
		}
	})
	t.Run("ErrNotNumbers", func(t *testing.T) {
		_, err := tab.Numbers("word")
		if err == nil || !strings.Contains(err.Error(), `row 2 ("x"), row 3 ("y")`) {
			t.Fatalf("got %v, want rows 2 and 3 named", err)
		}
	})
	t.Run("ErrAllMissing", func(t *testing.T) {
		_, err := tab.Numbers("blank")
		if err == nil || !strings.Contains(err.Error(), "empty in every row") {
			t.Fatalf("got %v, want an all-missing error", err)
		}
	})
	t.Run("ErrNoColumn", func(t *testing.T) {
		_, err := tab.Numbers("postt")
		if err == nil || !strings.Contains(err.Error(), `no column "postt"; the columns are "rid", "post"`) {
			t.Fatalf("got %v, want the columns listed", err)
		}
	})
}

// FuzzReadOutcomes holds the reader to its contract on any bytes: no panic,
// either an error or a table whose rows all match the header and whose row
// numbers increase. Seeds are in testdata/fuzz/FuzzReadOutcomes.
func FuzzReadOutcomes(f *testing.F) {
	f.Add([]byte("rid,post\nR1,1\n"))
	f.Fuzz(func(t *testing.T, data []byte) {
		tab, err := ReadOutcomes(strings.NewReader(string(data)), "fuzz.csv")
		if err != nil {
			if tab != nil {
				t.Fatalf("got a table and an error %v", err)
			}
			return
		}
		last := 1
		for i, r := range tab.Rows {
			if len(r) != len(tab.Header) {
				t.Fatalf("row %d has %d cells, header %d", i, len(r), len(tab.Header))
			}
			if tab.RowNumbers[i] <= last {
				t.Fatalf("row numbers do not increase: %v", tab.RowNumbers)
			}
			last = tab.RowNumbers[i]
		}
		for _, h := range tab.Header {
			if h != "" {
				if _, err := tab.Numbers(h); err != nil {
					var ie *InputError
					if !errors.As(err, &ie) {
						t.Fatalf("Numbers(%q): error %v is not an InputError", h, err)
					}
				}
			}
		}
	})
}
