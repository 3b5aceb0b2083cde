//! Who is on the other end of the admin socket: the peer's credentials (`SO_PEERCRED`, taken by the kernel
//! at `connect`, so a client cannot claim another user's) checked against the reviewer group.
//!
//! Allowed: root, the daemon's own user, and members of `[admin] reviewer_group` (their primary group is
//! it, or /etc/group lists them in it). Everyone else is refused with a reason, whatever the socket file's
//! mode says: the mode is a second fence, not the only one. Names come from /etc/passwd and /etc/group
//! (groups only known to a directory service must be given as a numeric gid and be the reviewers'
//! primary group).

use std::path::Path;

/// A user name from a passwd-format file, by uid.
pub fn user_name_in(passwd: &str, uid: u32) -> Option<String> {
    passwd.lines().find_map(|l| {
        let f: Vec<&str> = l.split(':').collect();
        (f.len() >= 3 && f[2].parse::<u32>().ok() == Some(uid)).then(|| f[0].to_string())
    })
}

/// A group's gid and listed members from a group-format file, by name or numeric gid.
pub fn group_in(group: &str, spec: &str) -> Option<(u32, Vec<String>)> {
    let want_gid = spec.parse::<u32>().ok();
    group
        .lines()
        .find_map(|l| {
            let f: Vec<&str> = l.split(':').collect();
            if f.len() < 4 {
                return None;
            }
            let gid = f[2].parse::<u32>().ok()?;
            let hit = f[0] == spec || want_gid == Some(gid);
            hit.then(|| {
                let members = f[3]
                    .split(',')
                    .filter(|m| !m.is_empty())
                    .map(str::to_string);
                (gid, members.collect())
            })
        })
        .or_else(|| want_gid.map(|g| (g, Vec::new())))
}

fn read(p: &str) -> String {
    std::fs::read_to_string(Path::new(p)).unwrap_or_default()
}

/// The OS user name of `uid` on this machine, if it has one.
pub fn user_name(uid: u32) -> Option<String> {
    user_name_in(&read("/etc/passwd"), uid)
}

/// Whether a peer (`uid`, primary `gid`) may use the admin socket of a daemon running as `daemon_uid`;
/// `Err` says why not.
pub fn check(uid: u32, gid: u32, daemon_uid: u32, reviewer_group: &str) -> Result<(), String> {
    check_with(
        uid,
        gid,
        daemon_uid,
        reviewer_group,
        &read("/etc/passwd"),
        &read("/etc/group"),
    )
}

/// [`check`] against given passwd and group text.
pub fn check_with(
    uid: u32,
    gid: u32,
    daemon_uid: u32,
    reviewer_group: &str,
    passwd: &str,
    group: &str,
) -> Result<(), String> {
    if uid == 0 || uid == daemon_uid {
        return Ok(());
    }
    let name = user_name_in(passwd, uid);
    let who = match &name {
        Some(n) => format!("user {n} (uid {uid})"),
        None => format!("uid {uid}"),
    };
    let spec = reviewer_group.trim();
    if spec.is_empty() {
        return Err(format!(
            "{who} may not use the admin socket: only root and the daemon's user may, as no reviewer group is configured ([admin] reviewer_group)"
        ));
    }
    let Some((rgid, members)) = group_in(group, spec) else {
        return Err(format!(
            "{who} may not use the admin socket: the reviewer group {spec:?} does not exist on this machine"
        ));
    };
    if gid == rgid || name.is_some_and(|n| members.contains(&n)) {
        Ok(())
    } else {
        Err(format!(
            "{who} may not use the admin socket: not a member of the reviewer group {spec}"
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const PASSWD: &str = "root:x:0:0:root:/root:/bin/bash\nlabelweir:x:990:990::/var/lib/labelweir:/usr/sbin/nologin\nalice:x:1001:1001::/home/alice:/bin/bash\nbob:x:1002:1002::/home/bob:/bin/bash\ncarol:x:1003:985::/home/carol:/bin/bash\n";
    const GROUP: &str =
        "root:x:0:\nlabelweir:x:990:\nlabelweir-review:x:985:alice\nalice:x:1001:\nbob:x:1002:\n";

    #[test]
    fn root_and_the_daemon_user_always_pass() {
        assert!(check_with(0, 0, 990, "", PASSWD, GROUP).is_ok());
        assert!(check_with(990, 990, 990, "", PASSWD, GROUP).is_ok());
    }

    #[test]
    fn members_by_list_or_primary_group_pass_others_are_told_why() {
        let g = "labelweir-review";
        assert!(
            check_with(1001, 1001, 990, g, PASSWD, GROUP).is_ok(),
            "listed"
        );
        assert!(
            check_with(1003, 985, 990, g, PASSWD, GROUP).is_ok(),
            "primary"
        );
        assert!(
            check_with(1003, 985, 990, "985", PASSWD, GROUP).is_ok(),
            "by gid"
        );
        let e = check_with(1002, 1002, 990, g, PASSWD, GROUP).unwrap_err();
        assert!(
            e.contains("user bob (uid 1002)") && e.contains("not a member"),
            "{e}"
        );
        let e = check_with(1002, 1002, 990, "", PASSWD, GROUP).unwrap_err();
        assert!(e.contains("reviewer_group"), "{e}");
        let e = check_with(1002, 1002, 990, "no-such", PASSWD, GROUP).unwrap_err();
        assert!(e.contains("does not exist"), "{e}");
    }
}
