package canon

import (
	"sort"
	"strconv"
	"unicode/utf8"
)

// maxExact is 2^53: integers up to it in magnitude are IEEE 754 doubles
// exactly, and ECMAScript writes them as plain decimal digits (RFC 8785
// §3.2.2.3), so their canonical form is strconv's.
const maxExact = 1 << 53

// AppendFlat appends the canonical form (RFC 8785) of v to dst without
// going through encoding/json, when v has one of the plain shapes that
// Trialogue's chain records have: a string of valid UTF-8, a bool, an
// integer of magnitude at most 2^53, or a map with ASCII keys (map[string]
// of any, string, int or int64) whose values are such values. For anything
// else ok is false and dst is returned unchanged: use Marshal.
func AppendFlat(dst []byte, v any) (out []byte, ok bool) {
	out, ok = appendFlat(dst, v, 0)
	if !ok {
		return dst, false
	}
	return out, true
}

func appendFlat(dst []byte, v any, depth int) ([]byte, bool) {
	if depth > 8 {
		return dst, false
	}
	switch x := v.(type) {
	case string:
		return appendValidString(dst, x)
	case bool:
		return strconv.AppendBool(dst, x), true
	case int:
		return appendInt(dst, int64(x))
	case int64:
		return appendInt(dst, x)
	case map[string]any:
		return appendMap(dst, x, depth)
	case map[string]string:
		return appendMap(dst, x, depth)
	case map[string]int64:
		return appendMap(dst, x, depth)
	case map[string]int:
		return appendMap(dst, x, depth)
	}
	return dst, false
}

func appendInt(dst []byte, n int64) ([]byte, bool) {
	if n > maxExact || n < -maxExact {
		return dst, false
	}
	return strconv.AppendInt(dst, n, 10), true
}

// appendMap writes an object with its members sorted by key. RFC 8785
// §3.2.3 sorts by UTF-16 code units; for ASCII keys that is byte order.
func appendMap[V any](dst []byte, m map[string]V, depth int) ([]byte, bool) {
	keys := make([]string, 0, len(m))
	for k := range m {
		for i := 0; i < len(k); i++ {
			if k[i] >= utf8.RuneSelf {
				return dst, false
			}
		}
		keys = append(keys, k)
	}
	sort.Strings(keys)
	dst = append(dst, '{')
	for i, k := range keys {
		if i > 0 {
			dst = append(dst, ',')
		}
		var ok bool
		if dst, ok = appendValidString(dst, k); !ok {
			return dst, false
		}
		dst = append(dst, ':')
		if dst, ok = appendFlat(dst, any(m[k]), depth+1); !ok {
			return dst, false
		}
	}
	return append(dst, '}'), true
}

// appendValidString writes a string the way Transform does (appendString,
// checked against the RFC 8785 vectors), when it is valid UTF-8;
// encoding/json would have replaced invalid bytes, which Marshal then keeps.
func appendValidString(dst []byte, s string) ([]byte, bool) {
	if !utf8.ValidString(s) {
		return dst, false
	}
	return appendString(dst, s), true
}
