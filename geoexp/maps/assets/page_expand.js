// Expands the compact unit record (geoexp/maps/_web.py) into GeoJSON; `i` is the unit's position.
  function expand(u) {
    var ox = u.origin[0], oy = u.origin[1], s = u.scale, feats = [];
    function dec(a) { return typeof a[0] === "number" ? [(a[0] + ox) * s, (a[1] + oy) * s] : a.map(dec); }
    for (var i = 0; i < u.id.length; i++) {
      var p = {id: u.id[i], e: u.e[i], i: i};
      if (u.d) p.d = u.d[i];
      if (u.ds) p.ds = u.dsn[u.ds[i]];
      if (u.c) p.c = u.cn[u.c[i]];
      if (u.p) p.p = u.p[i].map(function (v) { return v === null ? null : v / 1000; });
      feats.push({type: "Feature", properties: p,
                  geometry: {type: typeof u.t === "string" ? u.t : u.t[i], coordinates: dec(u.g[i])}});
    }
    return {type: "FeatureCollection", features: feats};
  }
  Object.keys(datasets).forEach(function (k) {
    if (datasets[k].compact) { datasets[k].data = expand(datasets[k].compact); delete datasets[k].compact; }
  });
