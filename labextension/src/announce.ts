/**
 * Announce each job's end once per browser profile: across page reloads and across several
 * open lab tabs. The announced keys live in localStorage; a Web Lock (navigator.locks,
 * W3C Web Locks API) makes "not announced yet? then mark it" one step for all tabs.
 */

const STORE_KEY = 'jobdesk:announced';
const LOCK_NAME = 'jobdesk-announce';
const KEEP = 500; // newest keys kept (common practice, no source: enough for any day's jobs)

function read(): Record<string, number> {
  try {
    return JSON.parse(window.localStorage.getItem(STORE_KEY) || '{}') || {};
  } catch {
    return {};
  }
}

function claimNow(key: string): boolean {
  const seen = read();
  if (key in seen) {
    return false;
  }
  seen[key] = Date.now();
  const kept = Object.entries(seen)
    .sort((a, b) => b[1] - a[1])
    .slice(0, KEEP);
  try {
    window.localStorage.setItem(STORE_KEY, JSON.stringify(Object.fromEntries(kept)));
  } catch {
    // storage full or disabled: announce anyway, once in this tab
  }
  return true;
}

/** True for the first caller (in any tab, any reload) with this key; false afterwards. */
export async function claimAnnouncement(key: string): Promise<boolean> {
  const locks = (navigator as any).locks;
  if (locks?.request) {
    return locks.request(LOCK_NAME, async () => claimNow(key));
  }
  return claimNow(key);
}

/** The key of one announcement: a job's end, or its result found truncated. */
export function announcementKey(job: { id: string; phase: string; truncated?: number | null }): string {
  return `${job.id}:${job.phase}${job.truncated ? ':truncated' : ''}`;
}
