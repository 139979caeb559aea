package figures

import (
	"fmt"
	"html/template"
	"io"
	"maps"
	"slices"
	"strconv"

	"rivalmix/alerts"
	"rivalmix/stream/category"
)

// Options tunes the category page.
type Options struct {
	// CoSegmentLimit is the largest number of products whose co-segment
	// heatmap is drawn (0: DefaultCoSegmentLimit); above it the page says
	// why there is none.
	CoSegmentLimit int
	// MoveRows bounds the moves table (0: 200).
	MoveRows int
	// ProductLink returns the address of a product's page, or "" for no
	// link. Nil links nothing.
	ProductLink func(product string) string
	// Members is how many members the segment table lists (0: 12).
	Members int
}

// SegmentRow is one row of the segment table.
type SegmentRow struct {
	category.SegmentView
	Colour string
	// Rank is the id's number (S3: 3), the table's sort key.
	Rank  int
	Shown []ProductLink
	More  int
}

// ProductLink is a product id and the address of its page ("" for none).
type ProductLink struct {
	ID, Href string
	// Rank is the id's place in reading order, the table's sort key.
	Rank int
}

// MoveRow is one row of the moves table.
type MoveRow struct {
	category.MoveView
	Product ProductLink
}

// AlertRow is one row of the missed-competitor table.
type AlertRow struct {
	category.AlertView
	Product ProductLink
}

// CategoryPage is everything a category's page shows.
type CategoryPage struct {
	Info          category.CategoryView
	Segments      []SegmentRow
	Figures       []Figure
	CoSegmentNote string
	Timeline      []Figure
	Moves         []MoveRow
	Alerts        []AlertRow
	// Products are the product sections of a report (empty on the
	// dashboard, whose product pages stand alone).
	Products []*ProductPage
	// Refits is the number of refits the timelines cover.
	Refits int
	// Bands are the decay bands by segment id, for the product pages.
	Bands map[string][][5]float64
}

// BuildSummary computes the summary line and segment table of a
// category page, without figures or tables.
func BuildSummary(v category.View, opt Options) *CategoryPage {
	pg := &CategoryPage{Info: v.Info, Refits: len(v.History)}
	link := opt.linker()
	members := opt.Members
	if members == 0 {
		members = 12
	}
	for _, s := range v.Segments {
		row := SegmentRow{SegmentView: s, Colour: Colour(SegmentColour(s.ID)), Rank: SegmentColour(s.ID) + 1}
		shown := s.Members
		if len(shown) > members {
			shown, row.More = shown[:members], len(shown)-members
		}
		for _, m := range shown {
			row.Shown = append(row.Shown, link(m))
		}
		pg.Segments = append(pg.Segments, row)
	}
	return pg
}

func (opt Options) linker() func(string) ProductLink {
	return func(p string) ProductLink {
		l := ProductLink{ID: p}
		if opt.ProductLink != nil {
			l.Href = opt.ProductLink(p)
		}
		return l
	}
}

// BuildCategory computes a category page from a view.
func BuildCategory(v category.View, opt Options) (*CategoryPage, error) {
	limit := opt.CoSegmentLimit
	if limit == 0 {
		limit = DefaultCoSegmentLimit
	}
	linker := opt.linker()
	link := func(p string) ProductLink {
		l := linker(p)
		if _, ok := v.Products[p]; !ok {
			l.Href = "" // withdrawn since: no page
		}
		return l
	}
	pg := BuildSummary(v, opt)
	if p := v.Posterior; p != nil {
		bands, err := Bands(p)
		if err != nil {
			return nil, err
		}
		pg.Bands = bands
		var series []DecaySeries
		for _, id := range p.SegmentIDs {
			series = append(series, DecaySeries{Name: id, Colour: SegmentColour(id), Q: bands[id]})
		}
		pg.Figures = append(pg.Figures, DecayChart("decay", fmt.Sprintf(
			"Decay of the relative cross-elasticity with competitor rank in each of the %d segments: posterior median (line), 50%% band (dark) and 90%% band (light) for a member with its segment's usual number of candidates.",
			len(series)), series))
		pg.Figures = append(pg.Figures, MembershipHeatmap(p))
		if n := len(p.Products); n <= limit {
			pg.Figures = append(pg.Figures, CoSegmentHeatmap(p))
		} else {
			pg.CoSegmentNote = fmt.Sprintf("No co-segment heatmap: the category has %d products, more than the limit of %d.", n, limit)
		}
	}
	if len(v.History) > 0 {
		pg.Timeline = append([]Figure{SizesChart("sizes", v.History)}, OperatorCharts(v.History)...)
	}
	rows := opt.MoveRows
	if rows == 0 {
		rows = 200
	}
	rank := ranks(v)
	for _, m := range v.Moves(rows) {
		l := link(m.Product)
		l.Rank = rank[m.Product]
		pg.Moves = append(pg.Moves, MoveRow{MoveView: m, Product: l})
	}
	for _, a := range v.Alerts {
		l := link(a.Product)
		l.Rank = rank[a.Product]
		pg.Alerts = append(pg.Alerts, AlertRow{AlertView: a, Product: l})
	}
	return pg, nil
}

// ranks numbers every product id of the view, its history's moves and
// its alerts in reading order (CompareIDs).
func ranks(v category.View) map[string]int {
	set := map[string]bool{}
	for p := range v.Products {
		set[p] = true
	}
	for _, m := range v.Moves(0) {
		set[m.Product] = true
	}
	for _, a := range v.Alerts {
		set[a.Product] = true
	}
	ids := slices.SortedFunc(maps.Keys(set), category.CompareIDs)
	out := make(map[string]int, len(ids))
	for i, p := range ids {
		out[p] = i
	}
	return out
}

// ProductPage is what a product's page shows.
type ProductPage struct {
	Category string
	View     category.ProductView
	// Memberships are the product's memberships, largest first.
	Memberships []Share
	Figures     []Figure
	// NoNext says why there is no predictive figure ("" when there is).
	NoNext string
}

// Share is a product's membership of one segment.
type Share struct {
	Segment string
	Value   float64
}

// BuildProduct computes a product's page; bands are the category page's.
func BuildProduct(v category.View, bands map[string][][5]float64, product string) (*ProductPage, error) {
	pv, ok := v.Products[product]
	if !ok {
		return nil, fmt.Errorf("figures: product %q not in category %q", product, v.Info.Name)
	}
	pg := &ProductPage{Category: v.Info.Name, View: pv}
	for s, q := range pv.Membership {
		if q.Defined() && q > 0 {
			pg.Memberships = append(pg.Memberships, Share{Segment: s, Value: float64(q)})
		}
	}
	slices.SortFunc(pg.Memberships, func(a, b Share) int {
		if a.Value != b.Value {
			if a.Value > b.Value {
				return -1
			}
			return 1
		}
		return category.CompareIDs(a.Segment, b.Segment)
	})
	fid := "product-" + anchorID(product)
	var reported []float64
	if pv.Last != nil {
		reported = pv.Last.Relative
	}
	if q, ok := bands[pv.PointSegment]; ok {
		pg.Figures = append(pg.Figures, DecayChart(fid+"-decay", fmt.Sprintf(
			"Reported relative cross-elasticities of %s (points) against the decay band of its point segment %s (median, 50%% and 90%% bands).",
			product, pv.PointSegment), []DecaySeries{{Name: pv.PointSegment, Colour: SegmentColour(pv.PointSegment), Q: q, Reported: reported}}))
	}
	if len(v.History) > 0 {
		pg.Figures = append(pg.Figures, MembershipOverRefits(fid+"-membership", product, v.History))
	}
	pg.NoNext = "Every candidate competitor was reported: there is no next value."
	if p := v.Posterior; p != nil {
		if i := slices.Index(p.Products, product); i >= 0 {
			if x, u, ok := NextCDF(p, i); ok {
				pg.NoNext = ""
				pg.Figures = append(pg.Figures, CDFChart(fid+"-next", fmt.Sprintf(
					"Predictive distribution of %s's strongest unreported competitor's relative cross-elasticity (posterior CDF), threshold marked.", product),
					x, u, float64(pv.Next.Threshold), float64(pv.Next.PExceed)))
			}
		}
	}
	return pg, nil
}

// anchorID turns a product id into a string safe in an element id.
func anchorID(s string) string {
	b := make([]byte, 0, len(s))
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '-' || c == '_' {
			b = append(b, c)
		} else {
			b = append(b, fmt.Sprintf("_%02x", c)...)
		}
	}
	return string(b)
}

// ProductAnchor is the fragment of a product's section in a report.
func ProductAnchor(product string) string { return "product-" + anchorID(product) }

// IndexEntry is one category on the dashboard's front page: its summary
// and segment table (BuildSummary) and the address of its page.
type IndexEntry struct {
	Page *CategoryPage
	Href string
}

type pageData struct {
	Title    string
	Caution  string
	Back     string
	Index    []IndexEntry
	Category *CategoryPage
	Product  *ProductPage
	Report   bool
	Note     string
	Refresh  bool
}

// RenderIndex writes the dashboard's front page.
func RenderIndex(w io.Writer, cats []IndexEntry) error {
	return pages.ExecuteTemplate(w, "page", pageData{Title: "rivalmix segments", Caution: alerts.Caution, Index: cats, Refresh: true})
}

// RenderCategory writes a category's dashboard page.
func RenderCategory(w io.Writer, pg *CategoryPage, back string) error {
	return pages.ExecuteTemplate(w, "page", pageData{Title: "Category " + pg.Info.Name, Caution: alerts.Caution,
		Back: back, Category: pg, Refresh: true})
}

// RenderProduct writes a product's dashboard page.
func RenderProduct(w io.Writer, pg *ProductPage, back string) error {
	return pages.ExecuteTemplate(w, "page", pageData{Title: "Product " + pg.View.Product + " in " + pg.Category,
		Caution: alerts.Caution, Back: back, Product: pg})
}

// RenderReport writes a self-contained report: the category page with
// its product sections; note is one line on how it was made.
func RenderReport(w io.Writer, pg *CategoryPage, note string) error {
	return pages.ExecuteTemplate(w, "page", pageData{Title: "rivalmix report: " + pg.Info.Name, Caution: alerts.Caution,
		Category: pg, Report: true, Note: note})
}

var pages = template.Must(template.New("pages").Funcs(template.FuncMap{
	"num": func(v any) string {
		switch x := v.(type) {
		case float64:
			return Num(x)
		case alerts.Float:
			return Num(float64(x))
		case float32:
			return Num(float64(x))
		}
		return fmt.Sprint(v)
	},
	"anchor": ProductAnchor,
	// prob writes a probability with three decimals.
	"prob":   func(v float64) string { return strconv.FormatFloat(v, 'f', 3, 64) },
	"median": func(m [3]alerts.Float, j int) string { return Num(float64(m[j])) },
}).Parse(pageTemplates))
