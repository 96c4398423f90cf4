// Shared by tickmark's pages: the page clock, the tab's storage, the socket
// address and small formatting helpers. No frameworks; nothing leaves the
// server's own origin.
'use strict';

const TM = (() => {
  // The page clock in nanoseconds, as a decimal string: performance.timeOrigin
  // + a performance.now() reading (or an event's timeStamp, which is on the
  // same base). The constant timeOrigin keeps times comparable across a
  // reload of the tab (a new document starts performance.now() again at 0).
  // BigInt keeps every nanosecond; a double would round at this size.
  const originMicros = BigInt(Math.round(performance.timeOrigin * 1000));
  function clockNs(ms) {
    return (originMicros * 1000n + BigInt(Math.round(ms * 1e6))).toString();
  }
  function nowNs() {
    return clockNs(performance.now());
  }

  // The tab's storage: sessionStorage, which a tab keeps across reloads and
  // forgets when it closes. The token lives here, never in a URL.
  const store = {
    get(key) {
      try {
        const v = sessionStorage.getItem('tickmark.' + key);
        return v === null ? null : JSON.parse(v);
      } catch (e) {
        return null;
      }
    },
    set(key, value) {
      try {
        sessionStorage.setItem('tickmark.' + key, JSON.stringify(value));
      } catch (e) { /* storage full or off: the page still works until reload */ }
    },
    remove(key) {
      try { sessionStorage.removeItem('tickmark.' + key); } catch (e) { /* ignore */ }
    },
  };

  function socketUrl(path) {
    return (location.protocol === 'https:' ? 'wss://' : 'ws://') + location.host + path;
  }

  function randomHex(bytes) {
    const a = new Uint8Array(bytes);
    crypto.getRandomValues(a);
    return Array.from(a, (b) => b.toString(16).padStart(2, '0')).join('');
  }

  // Session time (UTC-anchored ns, as a string) as a wall-clock time.
  function clockText(ns) {
    if (!ns || ns === '0') return '–';
    const ms = Number(BigInt(ns) / 1000000n);
    const d = new Date(ms);
    const p = (n, w) => String(n).padStart(w, '0');
    return p(d.getHours(), 2) + ':' + p(d.getMinutes(), 2) + ':' + p(d.getSeconds(), 2) + '.' +
        p(d.getMilliseconds(), 3);
  }

  // A duration in ns (number or string) in ms with sensible digits.
  function msText(ns) {
    const ms = Number(ns) / 1e6;
    if (!isFinite(ms)) return '–';
    if (ms < 10) return ms.toFixed(2) + ' ms';
    if (ms < 1000) return ms.toFixed(1) + ' ms';
    return (ms / 1000).toFixed(2) + ' s';
  }

  function valueText(v) {
    if (v === 1) return 'approve (+1)';
    if (v === -1) return 'disapprove (−1)';
    return (v > 0 ? '+' : v < 0 ? '−' : '') + String(Math.abs(v));
  }

  // gRPC status codes the pages explain (grpc/status.h).
  const Code = { OK: 0, CANCELLED: 1, INVALID_ARGUMENT: 3, DEADLINE_EXCEEDED: 4, NOT_FOUND: 5,
    ALREADY_EXISTS: 6, PERMISSION_DENIED: 7, RESOURCE_EXHAUSTED: 8, FAILED_PRECONDITION: 9,
    ABORTED: 10, OUT_OF_RANGE: 11, UNAVAILABLE: 14, UNAUTHENTICATED: 16 };

  // Retry delays after a lost connection: quick first, then up to 8 s.
  function backoffMs(attempt) {
    return Math.min(8000, 400 * Math.pow(2, Math.min(attempt, 5))) * (0.8 + 0.4 * Math.random());
  }

  function show(el, on) { el.hidden = !on; }

  return { clockNs, nowNs, store, socketUrl, randomHex, clockText, msText, valueText, Code,
    backoffMs, show };
})();
