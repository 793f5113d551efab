// Builds each declared layer from its dataset, then the legend control.
  cfg.layers.forEach(function (lay) {
    var ds = datasets[lay.data], filter = null;
    if (lay.kind === "condition") {
      filter = function (f) { return f.properties.c === lay.code; };
    } else if (lay.kind === "eligible") {
      filter = function (f) { return f.properties.e === 1; };
    }
    var gj = L.geoJSON(ds.data, {filter: filter, style: layerStyle(lay), interactive: lay.tip !== "none"});
    if (lay.tip === "unit") {
      gj.bindTooltip(unitTip(ds.meta), {sticky: true});
    } else if (lay.tip === "name") {
      gj.eachLayer(function (l) { l.bindTooltip(esc(l.feature.properties.name), {sticky: true}); });
    }
    if (lay.labels) {
      gj.eachLayer(function (l) {
        var pt = l.feature.properties.label_at;
        if (pt) {
          L.tooltip({permanent: true, direction: "center", className: "geoexp-district-label",
                     interactive: false})
            .setLatLng([pt[1], pt[0]]).setContent(esc(l.feature.properties.name)).addTo(groups[lay.group]);
        }
      });
    }
    gj.addTo(groups[lay.group]);
    handle.layers[lay.key] = gj;
    handle.groups[lay.key] = groups[lay.group];
    handle.expected[lay.key] = lay.expected;
  });

  var Legend = L.Control.extend({
    options: {position: "bottomright"},
    onAdd: function () {
      var div = L.DomUtil.create("div", "geoexp-legend");
      div.id = "geoexp-legend";
      div.innerHTML = {{ this.legend_html }};
      L.DomEvent.disableClickPropagation(div);
      L.DomEvent.disableScrollPropagation(div);
      return div;
    }
  });
  handle.legend = new Legend().addTo(map);
