// The planning and drawing pages: tooltips, probability styles, and the zone export button.
  function unitTip(meta) {
    return function (layer) {
      var p = layer.feature.properties, rows = [["unit", p.id]];
      if (p.d !== undefined) rows.push(["street", p.d]);
      if (p.ds !== undefined) rows.push(["district", p.ds]);
      if (p.c !== undefined) rows.push(["condition", meta.labels[p.c] || p.c]);
      rows.push(["eligible", p.e ? "yes" : "no"]);
      if (p.p) { for (var j = 0; j < p.p.length; j++) rows.push(["P(" + meta.prob_labels[j] + ")", fmt(p.p[j])]); }
      return '<table class="geoexp-tip">' + rows.map(function (r) {
        return "<tr><td><b>" + esc(r[0]) + "</b></td><td>" + esc(r[1]) + "</td></tr>"; }).join("") + "</table>";
    };
  }
  // Classes fitted to each layer's own values (bounds in lay.breaks, colours in lay.colours).
  function probStyle(j, base, breaks, colours) {
    return function (f) {
      var v = f.properties.p ? f.properties.p[j] : null;
      if (v === null || v === undefined || v <= 0) {
        return {color: cfg.never_colour, weight: 1, dashArray: "2 3", opacity: 0.9};
      }
      var k = 0;
      while (k < colours.length - 1 && v > breaks[k + 1]) k++;
      return {color: colours[k], weight: base, opacity: 1};
    };
  }
  function layerStyle(lay) {
    return lay.kind === "probability" ? probStyle(lay.index, lay.weight, lay.breaks, lay.colours)
      : function () { return lay.style; };
  }
  var handle = {map: map, layers: {}, groups: {}, expected: {}, drawn: null, legend: null};

  var drawn = groups[cfg.draw_group];
  handle.drawn = drawn;
  // Every zone carries the reason it is excluded: asked for when the zone is drawn, shown
  // as its tooltip, and saved with it (the planning map shows it beside the zone later).
  map.on(L.Draw.Event.CREATED, function (e) {
    var reason = window.prompt("Why is this area excluded? (saved with the zone)", "");
    e.layer.geoexpReason = (reason || "").trim();
    e.layer.bindTooltip(esc(e.layer.geoexpReason || "no reason recorded"), {sticky: true});
  });
  handle.zones = function () {
    var when = new Date().toISOString().slice(0, 10);
    var features = drawn.getLayers().map(function (layer, i) {
      var f = layer.toGeoJSON();
      f.properties = {zone: i + 1, reason: layer.geoexpReason || "", drawn_on: when};
      return f;
    });
    return {type: "FeatureCollection", features: features};
  };
  var Save = L.Control.extend({
    options: {position: "topleft"},
    onAdd: function () {
      var b = L.DomUtil.create("button", "geoexp-save");
      b.id = "geoexp-save-zones";
      b.type = "button";
      b.title = "Save the drawn polygons and rectangles as a GeoJSON file for [eligible] exclude";
      b.textContent = "Save zones";
      L.DomEvent.disableClickPropagation(b);
      L.DomEvent.on(b, "click", function () {
        var blob = new Blob([JSON.stringify(handle.zones())], {type: "application/geo+json"});
        var a = document.createElement("a");
        a.href = URL.createObjectURL(blob);
        a.download = cfg.zones_filename;
        document.body.appendChild(a);
        a.click();
        setTimeout(function () { URL.revokeObjectURL(a.href); a.remove(); }, 1000);
      });
      return b;
    }
  });
  new Save().addTo(map);
