// Ready reports whether the test broker answers a metadata request that lists
// it. deploy/kafka.sh runs it as a single-file program:
//
//	java -cp 'libs/*' Ready.java HOST:PORT NODE_ID
//
// Exit status 0: the broker at HOST:PORT listed node NODE_ID; 1: it did not, or
// did not answer within a few seconds (the message says which).
import java.util.Properties;
import java.util.concurrent.TimeUnit;
import org.apache.kafka.clients.admin.Admin;
import org.apache.kafka.clients.admin.AdminClientConfig;
import org.apache.kafka.common.Node;

public class Ready {
    public static void main(String[] args) throws Exception {
        Properties p = new Properties();
        p.put(AdminClientConfig.BOOTSTRAP_SERVERS_CONFIG, args[0]);
        p.put(AdminClientConfig.REQUEST_TIMEOUT_MS_CONFIG, "3000");
        p.put(AdminClientConfig.DEFAULT_API_TIMEOUT_MS_CONFIG, "4000");
        int want = Integer.parseInt(args[1]);
        try (Admin admin = Admin.create(p)) {
            for (Node n : admin.describeCluster().nodes().get(5, TimeUnit.SECONDS)) {
                if (n.id() == want) {
                    System.out.println("broker " + n.id() + " listed at " + n.host() + ":" + n.port());
                    return;
                }
            }
            System.out.println("metadata does not list broker " + want);
        } catch (Exception e) {
            System.out.println("no metadata yet: " + e.getMessage());
        }
        System.exit(1);
    }
}
