package figures

// pageTemplates are the dashboard's and the report's HTML. Everything is
// inline (style, figures, the table-sorting script), so a page works
// offline and a report is one file.
const pageTemplates = `
{{define "page"}}<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
{{if .Refresh}}<meta http-equiv="refresh" content="30">{{end}}
<meta name="viewport" content="width=device-width, initial-scale=1">
<link rel="icon" href="data:,">
<title>{{.Title}}</title>
<style>
body { font: 14px/1.45 system-ui, sans-serif; margin: 1.5em 2em; color: #1d1d1d; max-width: 1200px; }
h1 { font-size: 1.45em; margin-bottom: .2em; } h2 { font-size: 1.15em; margin-top: 2em; border-bottom: 1px solid #ddd; padding-bottom: .2em; }
h3 { font-size: 1.02em; margin-top: 1.4em; }
table { border-collapse: collapse; margin: .5em 0; }
th, td { padding: .25em .7em; border-bottom: 1px solid #e3e3e3; text-align: left; vertical-align: top; }
th { background: #f4f4f4; }
table.sortable th { cursor: pointer; user-select: none; }
table.sortable th::after { content: " \2195"; color: #999; font-size: .8em; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
.meta { color: #555; }
.caution { border-left: 4px solid #D55E00; padding: .4em .8em; background: #fbf3ec; }
.figs { display: flex; flex-wrap: wrap; gap: 0 2.5em; align-items: flex-start; }
figure { margin: 1.2em 0; } figcaption { color: #444; font-size: .92em; max-width: 900px; }
svg .axis-label { fill: #333; font-size: 12px; }
.swatch { display: inline-block; width: .8em; height: .8em; border-radius: 2px; margin-right: .3em; vertical-align: baseline; }
a { color: #0060a0; } td a { white-space: nowrap; }
</style>
</head>
<body>
{{if .Back}}<p class="meta"><a href="{{.Back}}">&larr; back</a></p>{{end}}
<h1>{{.Title}}</h1>
<p class="caution" id="caution">{{.Caution}}</p>
{{if .Note}}<p class="meta">{{.Note}}</p>{{end}}
{{if .Index}}{{template "index" .Index}}{{else if .Category}}{{template "category" .}}{{else if .Product}}{{template "product" .Product}}{{else}}<p>No refit has completed yet.</p>{{end}}
{{template "sortscript"}}
</body>
</html>
{{end}}

{{define "summary"}}<p class="meta summary">refit {{.LastRefit}} · {{.Products}} products · {{.Segments}} segments · ESS {{num .ESS}} · mean surprise {{num .MeanSurprise}} nats · {{.Events}} events</p>{{end}}

{{define "index"}}
<p class="meta">Segments of each category by how fast the relative cross-elasticities of its products' strongest competitors decay. JSON: <a href="/v1/categories">/v1/categories</a>; metrics: <a href="/metrics">/metrics</a>.</p>
{{range .}}<h2>{{.Page.Info.Name}}</h2>
{{template "summary" .Page.Info}}
<p><a class="category-link" href="{{.Href}}">Figures, moves and alerts of {{.Page.Info.Name}} &rarr;</a></p>
{{template "segments" .Page}}
{{end}}
{{end}}

{{define "category"}}{{$pg := .Category}}{{$report := .Report}}
{{template "summary" $pg.Info}}
<h2>Segments</h2>
{{template "segments" $pg}}
<h2>Figures</h2>
<div class="figs">{{range $pg.Figures}}{{.HTML}}
{{end}}</div>{{if $pg.CoSegmentNote}}<p class="meta" id="cosegment-note">{{$pg.CoSegmentNote}}</p>{{end}}
{{if $pg.Timeline}}<h2>Over {{$pg.Refits}} refits</h2>
<div class="figs">{{range $pg.Timeline}}{{.HTML}}
{{end}}</div>{{end}}
<h2>Latest moves</h2>
{{if $pg.Moves}}<table id="moves" class="sortable">
<thead><tr><th>product</th><th>from</th><th>to</th><th>membership of from</th><th>membership of to</th><th>refit</th></tr></thead>
<tbody>{{range $pg.Moves}}<tr><td data-key="{{.Product.Rank}}">{{template "plink" .Product}}</td><td>{{.From}}</td><td>{{.To}}</td><td class="n">{{prob .FromMembership}}</td><td class="n">{{prob .ToMembership}}</td><td>{{.Refit}}</td></tr>
{{end}}</tbody></table>{{else}}<p id="moves-none">No product has moved in the refits kept.</p>{{end}}
<h2>Missed-competitor alerts</h2>
{{if $pg.Alerts}}<table id="alerts" class="sortable">
<thead><tr><th>product</th><th>segment</th><th>P(next &gt; threshold)</th><th>threshold</th><th>median of next value</th><th>interval of next value</th><th>refit</th></tr></thead>
<tbody>{{range $pg.Alerts}}<tr><td data-key="{{.Product.Rank}}">{{template "plink" .Product}}</td><td>{{.Segment}}</td><td class="n">{{prob .Probability}}</td><td class="n">{{num .Threshold}}</td><td class="n">{{num .Median}}</td><td class="n" data-key="{{.Lo}}">{{num .Lo}} – {{num .Hi}}</td><td>{{.Refit}}</td></tr>
{{end}}</tbody></table>
<p class="meta">The next value is the relative cross-elasticity of the strongest competitor the refit did not report; the interval runs from its 10% to its 90% quantile unless configured otherwise.</p>{{else}}<p id="alerts-none">No missed-competitor alert is active.</p>{{end}}
{{if $pg.Products}}<h2>Products</h2>
{{range $pg.Products}}<section id="{{anchor .View.Product}}">{{template "product" .}}</section>
{{end}}{{end}}
{{end}}

{{define "segments"}}<table class="segments sortable">
<thead><tr><th>segment</th><th>size (products)</th><th>median 1st</th><th>median 2nd</th><th>median 3rd</th><th>expected reported</th><th>members</th></tr></thead>
<tbody>{{range .Segments}}<tr><td data-key="{{.Rank}}"><span class="swatch" style="background:{{.Colour}}"></span>{{.ID}}</td><td class="n">{{.Size}}</td><td class="n">{{median .Medians 0}}</td><td class="n">{{median .Medians 1}}</td><td class="n">{{median .Medians 2}}</td><td class="n">{{num .MeanReported}}</td><td>{{range $i, $m := .Shown}}{{if $i}}, {{end}}{{template "plink" $m}}{{end}}{{if .More}} and {{.More}} more{{end}}</td></tr>
{{end}}</tbody></table>
<p class="meta">Medians are of the strongest, second and third strongest relative cross-elasticity of a member (ratio of the competitor's cross-price elasticity to the product's own-price elasticity, in absolute value); expected reported is the typical number of competitors a member's refit reports.</p>
{{end}}

{{define "plink"}}{{if .Href}}<a href="{{.Href}}">{{.ID}}</a>{{else}}{{.ID}}{{end}}{{end}}

{{define "product"}}
<h3>{{.View.Product}}</h3>
<table class="facts">
<tr><th>reported segment</th><td>{{.View.Segment}}</td></tr>
<tr><th>point segment</th><td>{{.View.PointSegment}}</td></tr>
<tr><th>membership</th><td>{{range $i, $s := .Memberships}}{{if $i}}, {{end}}{{$s.Segment}} {{num $s.Value}}{{end}}</td></tr>
{{with .View.Last}}<tr><th>last refit</th><td>{{.Refit}}: {{len .Relative}} of {{.Competitors}} competitors reported</td></tr>{{end}}
{{if .View.Next.Defined}}<tr><th>next unreported value</th><td>median {{num .View.Next.Median}}, interval {{num .View.Next.Lo}} – {{num .View.Next.Hi}}, P(&gt; {{num .View.Next.Threshold}}) = {{num .View.Next.PExceed}}</td></tr>{{end}}
</table>
<p class="meta">The reported segment changes only with a move (held back by hysteresis); the point segment is where the latest refit puts the product. Each membership is the mean posterior chance of sharing a segment with that segment's members, so they need not sum to 1.</p>
<div class="figs">{{range .Figures}}{{.HTML}}
{{end}}</div>{{if .NoNext}}<p class="meta">{{.NoNext}}</p>{{end}}
{{end}}

{{define "sortscript"}}<script>
(function () {
  function key(td) { var k = td.getAttribute("data-key"); return k === null ? td.textContent.trim() : k; }
  document.querySelectorAll("table.sortable").forEach(function (table) {
    table.querySelectorAll("th").forEach(function (th, col) {
      th.addEventListener("click", function () {
        var body = table.tBodies[0], rows = Array.prototype.slice.call(body.rows);
        var dir = th.getAttribute("data-dir") === "asc" ? -1 : 1;
        rows.sort(function (a, b) {
          var x = key(a.cells[col]), y = key(b.cells[col]), nx = parseFloat(x), ny = parseFloat(y);
          if (!isNaN(nx) && !isNaN(ny) && String(nx) === x && String(ny) === y) { return dir * (nx - ny); }
          return dir * (x < y ? -1 : x > y ? 1 : 0);
        });
        th.setAttribute("data-dir", dir === 1 ? "asc" : "desc");
        rows.forEach(function (r) { body.appendChild(r); });
      });
    });
  });
})();
</script>{{end}}
`
