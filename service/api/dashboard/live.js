// The live event stream (Server-Sent Events), read with fetch so that it can carry the token, and
// reconnected by itself after a network drop or a service restart, with a growing pause (1 s to 15 s).

import { headers } from "./api.js";

export class LiveFeed {
  constructor(onEvent, onState) {
    this.onEvent = onEvent;
    this.onState = onState;
    this.pause = 1000;
    this.stopped = false;
    this.controller = null;
    this.restarting = false;
  }

  start() {
    this.stopped = false;
    this.connect();
  }

  stop() {
    this.stopped = true;
    if (this.controller) this.controller.abort();
  }

  restart() {                      // the token changed: the stream may now be allowed, or no longer
    this.restarting = true;
    if (this.controller) this.controller.abort();
  }

  async connect() {
    while (!this.stopped) {
      this.controller = new AbortController();
      try {
        const response = await fetch("/api/v1/events", {
          headers: headers({ Accept: "text/event-stream" }),
          signal: this.controller.signal,
          cache: "no-store",
        });
        if (!response.ok || !response.body) throw new Error(`HTTP ${response.status}`);
        this.onState("live", "Live");
        this.pause = 1000;
        await this.read(response.body.getReader());
        throw new Error("stream ended");
      } catch (error) {
        if (this.stopped) return;
        if (this.restarting) {           // asked for: connect again at once, nothing to report
          this.restarting = false;
          continue;
        }
        const seconds = Math.round(this.pause / 1000);
        this.onState("reconnecting", `Live: reconnecting in ${seconds} s (${error.message})`);
        await new Promise((resolve) => setTimeout(resolve, this.pause));
        this.pause = Math.min(this.pause * 2, 15000);
      }
    }
  }

  async read(reader) {
    const decoder = new TextDecoder();
    let buffer = "";
    for (;;) {
      const { value, done } = await reader.read();
      if (done) return;
      buffer += decoder.decode(value, { stream: true });
      let end;
      while ((end = buffer.indexOf("\n\n")) >= 0) {
        const block = buffer.slice(0, end);
        buffer = buffer.slice(end + 2);
        const data = block.split("\n").filter((line) => line.startsWith("data:"))
          .map((line) => line.slice(5).trimStart()).join("\n");
        if (!data) continue;                 // a keep-alive comment or the retry hint
        try {
          this.onEvent(JSON.parse(data));
        } catch (error) {
          console.warn("event not understood", error);
        }
      }
    }
  }
}
