// Package figures draws the dashboard's and the reports' figures as
// hand-built SVG and lays out their HTML pages: decay bands per segment,
// membership and co-segment heatmaps, timelines over refits and a
// product's predictive distribution. It computes figure data from a
// category.View (its posterior draws and history) and writes no file and
// opens no connection; the pages load nothing from outside.
package figures
