// The result page: tooltips with pre, post and change, and unit lines coloured by the change.
  var values = JSON.parse(document.getElementById("geoexp-result-values").textContent);
  function num(v) { return (v === null || v === undefined) ? "n/a" : String(v); }
  function signed(v) {
    if (v === null || v === undefined) return "n/a";
    return (v > 0 ? "+" : "") + String(v);
  }
  function unitTip(meta) {
    return function (layer) {
      var p = layer.feature.properties, i = p.i, rows = [["unit", p.id]];
      if (p.d !== undefined) rows.push(["street", p.d]);
      if (p.ds !== undefined) rows.push(["district", p.ds]);
      rows.push(["condition", meta.labels[p.c] || p.c]);
      rows.push(["pre", num(values.pre[i])]);
      rows.push(["post", num(values.post[i])]);
      rows.push(["change", signed(values.change[i])]);
      if (p.p) { for (var j = 0; j < p.p.length; j++) rows.push(["P(" + meta.prob_labels[j] + ")", fmt(p.p[j])]); }
      return '<table class="geoexp-tip">' + rows.map(function (r) {
        return "<tr><td><b>" + esc(r[0]) + "</b></td><td>" + esc(r[1]) + "</td></tr>"; }).join("") + "</table>";
    };
  }
  function layerStyle(lay) {
    if (!lay.coloured) return function () { return lay.style; };
    return function (f) {
      var out = Object.assign({}, lay.style);
      out.color = values.palette[values.colour[f.properties.i]];
      return out;
    };
  }
  var handle = {map: map, layers: {}, groups: {}, expected: {}, legend: null, values: values};
