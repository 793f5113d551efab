// Leaves the handle (window.geoexpMap) that the browser tests read.
  window.geoexpMap = handle;
})();
