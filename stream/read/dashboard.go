package read

import (
	"bytes"
	"errors"
	"fmt"
	"net/http"
	"net/url"
	"sync"

	"rivalmix/figures"
	"rivalmix/stream/category"
)

// pageCache keeps each category's computed dashboard page until its view
// is updated: the figures cost a pass over the posterior draws, which a
// page reload should not repeat.
type pageCache struct {
	mu    sync.Mutex
	pages map[string]cachedPage
}

type cachedPage struct {
	gen  uint64
	page *figures.CategoryPage
}

func newPageCache() *pageCache { return &pageCache{pages: map[string]cachedPage{}} }

// categoryHref is the dashboard address of a category's page.
func categoryHref(cat string) string { return "/categories/" + url.PathEscape(cat) }

// productHref is the dashboard address of a product's page.
func productHref(cat, product string) string {
	return categoryHref(cat) + "/products/" + url.PathEscape(product)
}

// page returns the category's page, computing it once per view.
func (h *httpAPI) page(cat string) (category.View, *figures.CategoryPage, error) {
	v, gen, limit, ok := h.views.view(cat)
	if !ok {
		return v, nil, fmt.Errorf("category %q: %w (no completed refit)", cat, ErrNotFound)
	}
	h.pages.mu.Lock()
	defer h.pages.mu.Unlock()
	if c, ok := h.pages.pages[cat]; ok && c.gen == gen {
		return v, c.page, nil
	}
	pg, err := figures.BuildCategory(v, figures.Options{CoSegmentLimit: limit, MoveRows: MaxMoves,
		ProductLink: func(p string) string { return productHref(cat, p) }})
	if err != nil {
		return v, nil, err
	}
	h.pages.pages[cat] = cachedPage{gen: gen, page: pg}
	return v, pg, nil
}

// index serves the front page: every category's summary line and
// segments, linking to its page.
func (h *httpAPI) index(w http.ResponseWriter, r *http.Request) {
	var entries []figures.IndexEntry
	for _, c := range h.views.Categories() {
		v, _, _, ok := h.views.view(c.Name)
		if !ok {
			continue
		}
		pg := figures.BuildSummary(v, figures.Options{ProductLink: func(p string) string { return productHref(c.Name, p) }})
		entries = append(entries, figures.IndexEntry{Page: pg, Href: categoryHref(c.Name)})
	}
	h.html(w, func(b *bytes.Buffer) error { return figures.RenderIndex(b, entries) })
}

func (h *httpAPI) categoryPage(w http.ResponseWriter, r *http.Request) {
	_, pg, err := h.page(r.PathValue("category"))
	if err != nil {
		h.htmlError(w, err)
		return
	}
	h.html(w, func(b *bytes.Buffer) error { return figures.RenderCategory(b, pg, "/") })
}

func (h *httpAPI) productPage(w http.ResponseWriter, r *http.Request) {
	cat, product := r.PathValue("category"), r.PathValue("product")
	v, pg, err := h.page(cat)
	if err != nil {
		h.htmlError(w, err)
		return
	}
	if _, ok := v.Products[product]; !ok {
		h.htmlError(w, fmt.Errorf("product %q in category %q: %w", product, cat, ErrNotFound))
		return
	}
	pp, err := figures.BuildProduct(v, pg.Bands, product)
	if err != nil {
		h.htmlError(w, err)
		return
	}
	h.html(w, func(b *bytes.Buffer) error { return figures.RenderProduct(b, pp, categoryHref(cat)) })
}

// html renders a page into a buffer first, so a template error becomes a
// 500 instead of half a page.
func (h *httpAPI) html(w http.ResponseWriter, render func(*bytes.Buffer) error) {
	var b bytes.Buffer
	if err := render(&b); err != nil {
		h.lg.Error("http render dashboard", "err", err)
		h.text(w, http.StatusInternalServerError, "cannot render the page\n")
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	if _, err := w.Write(b.Bytes()); err != nil {
		h.lg.Debug("http write", "err", err)
	}
}

func (h *httpAPI) htmlError(w http.ResponseWriter, err error) {
	code := http.StatusInternalServerError
	if errorsIsNotFound(err) {
		code = http.StatusNotFound
	} else {
		h.lg.Error("http dashboard", "err", err)
	}
	h.text(w, code, err.Error()+"\n")
}

func errorsIsNotFound(err error) bool { return errors.Is(err, ErrNotFound) }
